//! `medley replay`: logged requests with their clicks, re-ranked by every (algorithm, lambda),
//! scored for accuracy and diversity, so each slice's `lambda` is chosen on evidence.
//!
//! Each logged line is a re-rank request plus `"clicked": [ids]`. Lines are validated once into
//! slates (the same validation as the server), then every cell of the grid re-ranks every slate
//! on all cores. Per cell it reports:
//! - accuracy: recall@k and nDCG@k (binary gains, log2 discount) in their textbook form, whose
//!   ideal and denominator count every item the line logs as clicked, offered or not; the same
//!   two restricted to the clicked items among the candidates (`recall_reachable`,
//!   `ndcg_reachable`: what a re-ranker of this candidate set could at best reach); and
//!   relevance retained (Σ normalised score of the slate ÷ Σ of the relevance top-k);
//! - diversity: mean category entropy (bits), mean intra-list distance, mean distinct categories,
//!   and over all slates the item coverage and the Gini coefficient of item exposure.
//!
//! Output: a table, `frontier.csv` and, through [`crate::replay_plot`], `frontier.svg`.

use std::collections::HashMap;
use std::io::BufRead;

use rayon::prelude::*;
use serde::Deserialize;

use crate::diversify::{self, Diversifier};
use crate::engine::Engine;
use crate::measures;
use crate::model::{Params, RerankInput};
use crate::pool::run_here;
use crate::wire::RerankRequest;

/// One logged line.
#[derive(Debug, Deserialize)]
struct Logged {
    #[serde(flatten)]
    request: RerankRequest,
    #[serde(default)]
    clicked: Vec<String>,
}

/// A validated logged slate.
#[derive(Debug)]
pub struct Slate {
    input: RerankInput,
    /// Whether each candidate was clicked.
    clicked: Vec<bool>,
    /// Distinct ids the line logs as clicked, among the candidates or not: the relevant set of
    /// the standard nDCG and recall.
    relevant: usize,
    /// Global item number of each candidate (for coverage and exposure).
    item: Vec<u32>,
}

/// The logged corpus, validated.
#[derive(Debug)]
pub struct Corpus {
    slates: Vec<Slate>,
    items: usize,
    /// Lines skipped, with the reason of the first few.
    pub skipped: Vec<(u64, String)>,
}

impl Corpus {
    /// Number of slates.
    #[must_use]
    pub fn len(&self) -> usize {
        self.slates.len()
    }

    /// True when no line was usable.
    #[must_use]
    pub fn is_empty(&self) -> bool {
        self.slates.is_empty()
    }
}

/// Lines parsed and validated together, in parallel; bounds the raw text held at once.
const READ_CHUNK_LINES: usize = 4096;

/// Reads and validates a logged corpus; lines without clicks or that fail validation are
/// skipped and reported. Lines are read in chunks of 4 096 (`READ_CHUNK_LINES`), each chunk parsed and
/// validated on all cores, and item ids numbered in line order afterwards, so the result does
/// not depend on the number of threads.
///
/// # Errors
/// Only I/O errors on `input`.
pub fn read_corpus(engine: &Engine, input: &mut dyn BufRead) -> std::io::Result<Corpus> {
    let mut items: HashMap<String, u32> = HashMap::new();
    let (mut slates, mut skipped) = (Vec::new(), Vec::new());
    let mut number = 0_u64;
    let mut chunk: Vec<(u64, Vec<u8>)> = Vec::with_capacity(READ_CHUNK_LINES);
    loop {
        chunk.clear();
        while chunk.len() < READ_CHUNK_LINES {
            let mut line = Vec::new();
            if input.read_until(b'\n', &mut line)? == 0 {
                break;
            }
            number += 1;
            if !line.trim_ascii().is_empty() {
                chunk.push((number, line));
            }
        }
        if chunk.is_empty() {
            break;
        }
        let parsed: Vec<(u64, Validated)> =
            chunk.par_iter().map(|(n, line)| (*n, validate_line(engine, line))).collect();
        for (n, result) in parsed {
            match result {
                Err(reason) => skipped.push((n, reason)),
                Ok((input, clicked, relevant)) => {
                    let item = input
                        .ids()
                        .iter()
                        .map(|id| {
                            let next = u32::try_from(items.len()).unwrap_or(u32::MAX);
                            *items.entry(id.clone()).or_insert(next)
                        })
                        .collect();
                    slates.push(Slate { input, clicked, relevant, item });
                }
            }
        }
    }
    Ok(Corpus { slates, items: items.len(), skipped })
}

/// A validated slate, its click flags and its number of distinct clicked ids, or why its line
/// is skipped.
type Validated = Result<(RerankInput, Vec<bool>, usize), String>;

/// One logged line into a validated slate and its click flags, or why it is skipped.
fn validate_line(engine: &Engine, line: &[u8]) -> Validated {
    let logged: Logged = serde_json::from_slice(line).map_err(|e| e.to_string())?;
    if logged.clicked.is_empty() {
        return Err("no \"clicked\" ids".into());
    }
    // Validate as a DPP request on the default slice of `engine` (which the caller builds
    // unlocked), so every slate has embeddings and every algorithm can run on it.
    let mut request = logged.request;
    request.slice = None;
    request.algorithm = Some("dpp".into());
    request.lambda = None;
    request.k = None;
    let input = engine.prepare(request).map_err(|e| e.to_string())?.input;
    let mut distinct: Vec<&str> = logged.clicked.iter().map(String::as_str).collect();
    distinct.sort_unstable();
    distinct.dedup();
    let clicked = input.ids().iter().map(|id| distinct.binary_search(&id.as_str()).is_ok()).collect();
    Ok((input, clicked, distinct.len()))
}

/// recall@k: clicked items in the slate ÷ `relevant`, the number of relevant items (0 when
/// there are none).
///
/// Pass the distinct clicked ids of the line for the standard recall, or the clicked
/// candidates ([`reachable`]) for the candidate-restricted variant.
#[must_use]
pub fn recall(slate: &[usize], clicked: &[bool], relevant: usize) -> f64 {
    if relevant == 0 {
        return 0.0;
    }
    slate.iter().filter(|&&i| clicked[i]).count() as f64 / relevant as f64
}

/// The clicked items among the candidates: the relevant set of the `_reachable` variants.
#[must_use]
pub fn reachable(clicked: &[bool]) -> usize {
    clicked.iter().filter(|&&c| c).count()
}

/// nDCG@k with binary gains and a log2 discount, over `relevant` relevant items.
///
/// # Reference
/// K. Järvelin and J. Kekäläinen, "Cumulated gain-based evaluation of IR techniques", ACM TOIS
/// 20(4), 2002: `DCG@k = Σ_{r=1..k} rel_r / log2(r + 1)`, normalised by the DCG of the ideal
/// ranking, which puts *every* relevant item first: `min(relevant, k)` hits. With `relevant` =
/// the line's distinct clicked ids this is the textbook nDCG, which counts a clicked item that
/// retrieval never offered as a miss of every re-ranker alike; with `relevant` =
/// [`reachable`]`(clicked)` it is the candidate-restricted variant (`ndcg_reachable`).
#[must_use]
pub fn ndcg(slate: &[usize], clicked: &[bool], relevant: usize, k: usize) -> f64 {
    let discount = |rank: usize| 1.0 / ((rank + 1) as f64).log2();
    let dcg: f64 =
        slate.iter().take(k).enumerate().filter(|(_, &i)| clicked[i]).map(|(r, _)| discount(r + 1)).sum();
    let ideal_hits = relevant.min(k);
    let idcg: f64 = (1..=ideal_hits).map(discount).sum();
    // An empty f64 sum is -0.0; report +0 for a slate with no hits.
    if idcg == 0.0 {
        0.0
    } else {
        dcg / idcg + 0.0
    }
}

/// One cell of the grid.
#[derive(Debug, Clone, PartialEq)]
pub struct Point {
    /// Algorithm.
    pub algorithm: &'static str,
    /// Lambda.
    pub lambda: f64,
    /// Mean recall@k over all logged clicks.
    pub recall: f64,
    /// Mean nDCG@k over all logged clicks (Järvelin & Kekäläinen 2002).
    pub ndcg: f64,
    /// Mean recall@k over the clicked candidates only.
    pub recall_reachable: f64,
    /// Mean nDCG@k over the clicked candidates only.
    pub ndcg_reachable: f64,
    /// Mean relevance retained.
    pub relevance_retained: f64,
    /// Mean category entropy, bits.
    pub entropy: f64,
    /// Mean intra-list distance.
    pub ild: f64,
    /// Mean distinct categories.
    pub distinct: f64,
    /// Distinct items exposed ÷ distinct items offered.
    pub coverage: f64,
    /// Gini coefficient of item exposure over offered items.
    pub gini: f64,
}

/// Per-slate results, summed in parallel.
#[derive(Debug, Clone, Default)]
struct Sums {
    recall: f64,
    ndcg: f64,
    recall_reachable: f64,
    ndcg_reachable: f64,
    retained: f64,
    entropy: f64,
    ild: f64,
    distinct: f64,
}

impl Sums {
    fn add(mut self, o: &Self) -> Self {
        self.recall += o.recall;
        self.ndcg += o.ndcg;
        self.recall_reachable += o.recall_reachable;
        self.ndcg_reachable += o.ndcg_reachable;
        self.retained += o.retained;
        self.entropy += o.entropy;
        self.ild += o.ild;
        self.distinct += o.distinct;
        self
    }
}

/// Evaluates one (algorithm, lambda) on every slate, in parallel.
///
/// # Errors
/// A message if the algorithm rejects a slate (cannot happen for validated slates with
/// embeddings; reported rather than panicking).
pub fn evaluate(
    corpus: &Corpus,
    algorithm: &'static dyn Diversifier,
    lambda: f64,
    k: usize,
) -> Result<Point, String> {
    let limits = crate::model::Limits { max_k: k.max(1), ..crate::model::Limits::default() };
    let params = Params::new(k as u64, lambda, &limits).map_err(|e| e.to_string())?;
    let relevance = diversify::by_name("relevance").ok_or("relevance is registered")?;
    let per_slate: Result<Vec<(Sums, Vec<usize>)>, String> = corpus
        .slates
        .par_iter()
        .map(|s| {
            let (picked, base) = run_here(|ws| {
                let picked = algorithm.select(&s.input, &params, ws).map_err(|e| e.to_string())?;
                let base = relevance.select(&s.input, &params, ws).map_err(|e| e.to_string())?;
                Ok::<_, String>((picked.indices, base.indices))
            })
            .map_err(|e| e.to_string())??;
            let score = |sl: &[usize]| sl.iter().map(|&i| s.input.normalized()[i]).sum::<f64>();
            let base_score = score(&base);
            let sums = Sums {
                recall: recall(&picked, &s.clicked, s.relevant),
                ndcg: ndcg(&picked, &s.clicked, s.relevant, k),
                recall_reachable: recall(&picked, &s.clicked, reachable(&s.clicked)),
                ndcg_reachable: ndcg(&picked, &s.clicked, reachable(&s.clicked), k),
                retained: if base_score > 0.0 { score(&picked) / base_score } else { 1.0 },
                entropy: measures::category_entropy_bits(&s.input, &picked),
                ild: measures::intra_list_distance(&s.input, &picked).unwrap_or(0.0),
                distinct: measures::distinct_categories(&s.input, &picked) as f64,
            };
            Ok((sums, picked.iter().map(|&i| s.item[i] as usize).collect()))
        })
        .collect();
    let per_slate = per_slate?;
    let n = corpus.slates.len().max(1) as f64;
    let total = per_slate.iter().fold(Sums::default(), |acc, (s, _)| acc.add(s));
    let mut exposure = vec![0_u64; corpus.items];
    for (_, items) in &per_slate {
        for &i in items {
            exposure[i] += 1;
        }
    }
    let exposed = exposure.iter().filter(|&&e| e > 0).count();
    Ok(Point {
        algorithm: algorithm.name(),
        lambda,
        recall: total.recall / n,
        ndcg: total.ndcg / n,
        recall_reachable: total.recall_reachable / n,
        ndcg_reachable: total.ndcg_reachable / n,
        relevance_retained: total.retained / n,
        entropy: total.entropy / n,
        ild: total.ild / n,
        distinct: total.distinct / n,
        coverage: measures::coverage(exposed, corpus.items),
        gini: measures::gini(&exposure),
    })
}

/// Parses `0,0.1,0.5` or `start:end:step` (inclusive of `end` within rounding).
///
/// # Errors
/// A message naming the bad part.
pub fn parse_lambdas(text: &str) -> Result<Vec<f64>, String> {
    let check =
        |x: f64| if (0.0..=1.0).contains(&x) { Ok(x) } else { Err(format!("lambda {x} is outside [0, 1]")) };
    let num = |s: &str| s.trim().parse::<f64>().map_err(|_| format!("{s:?} is not a number"));
    let parts: Vec<&str> = text.split(':').collect();
    if parts.len() == 3 {
        let (start, end, step) = (num(parts[0])?, num(parts[1])?, num(parts[2])?);
        if step <= 0.0 || end < start {
            return Err(format!("{text:?}: want start:end:step with end >= start and step > 0"));
        }
        let count = ((end - start) / step + 1e-9).floor() as usize;
        // Round to 1e-9 so 0:1:0.1 gives 0.3, not 0.30000000000000004.
        return (0..=count).map(|i| check(((start + i as f64 * step) * 1e9).round() / 1e9)).collect();
    }
    text.split(',').map(|s| num(s).and_then(check)).collect()
}

/// A `--pick` rule: keep `metric >= factor × baseline`, maximise mean entropy.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PickRule {
    /// `ndcg`, `recall`, `ndcg_reachable`, `recall_reachable` or `relevance_retained`.
    pub metric: &'static str,
    /// Share of the relevance baseline that must be kept.
    pub factor: f64,
}

/// Parses `ndcg>=0.95*baseline`.
///
/// # Errors
/// A message saying what form is expected.
pub fn parse_pick(text: &str) -> Result<PickRule, String> {
    let expected = || {
        format!(
            "{text:?}: expected METRIC>=FACTOR*baseline with METRIC one of ndcg, recall, ndcg_reachable, recall_reachable, relevance_retained"
        )
    };
    let (metric, rest) = text.split_once(">=").ok_or_else(expected)?;
    let metric = match metric.trim() {
        "ndcg" => "ndcg",
        "recall" => "recall",
        "ndcg_reachable" => "ndcg_reachable",
        "recall_reachable" => "recall_reachable",
        "relevance_retained" => "relevance_retained",
        _ => return Err(expected()),
    };
    let factor = rest.trim().strip_suffix("*baseline").ok_or_else(expected)?;
    let factor: f64 = factor.trim().parse().map_err(|_| expected())?;
    Ok(PickRule { metric, factor })
}

impl Point {
    /// The value of a named accuracy metric.
    #[must_use]
    pub fn metric(&self, name: &str) -> f64 {
        match name {
            "recall" => self.recall,
            "ndcg_reachable" => self.ndcg_reachable,
            "recall_reachable" => self.recall_reachable,
            "relevance_retained" => self.relevance_retained,
            _ => self.ndcg,
        }
    }
}

/// Per algorithm, the most diverse point (highest mean entropy) that keeps the rule; `None` for an
/// algorithm with no such point.
#[must_use]
pub fn pick<'a>(
    points: &'a [Point],
    baseline: &Point,
    rule: &PickRule,
) -> Vec<(&'static str, Option<&'a Point>)> {
    let floor = rule.factor * baseline.metric(rule.metric);
    let mut names: Vec<&'static str> = Vec::new();
    for p in points {
        if !names.contains(&p.algorithm) {
            names.push(p.algorithm);
        }
    }
    names
        .into_iter()
        .map(|name| {
            let best = points
                .iter()
                .filter(|p| p.algorithm == name && p.metric(rule.metric) >= floor)
                .max_by(|a, b| a.entropy.total_cmp(&b.entropy).then(b.lambda.total_cmp(&a.lambda)));
            (name, best)
        })
        .collect()
}

/// The CSV header of `frontier.csv`.
pub const CSV_HEADER: &str = "algorithm,lambda,recall,ndcg,recall_reachable,ndcg_reachable,relevance_retained,entropy_bits,ild,distinct,coverage,gini";

/// One CSV row; `label` fills the algorithm column (`baseline` for the baseline row).
#[must_use]
pub fn csv_row(label: &str, p: &Point) -> String {
    format!(
        "{},{},{:.6},{:.6},{:.6},{:.6},{:.6},{:.6},{:.6},{:.6},{:.6},{:.6}",
        label,
        p.lambda,
        p.recall,
        p.ndcg,
        p.recall_reachable,
        p.ndcg_reachable,
        p.relevance_retained,
        p.entropy,
        p.ild,
        p.distinct,
        p.coverage,
        p.gini
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Hand-computed from the definitions (Järvelin & Kekäläinen 2002, binary gains).
    #[test]
    fn ndcg_and_recall_small_cases() {
        // Candidates 0..5, clicked {1, 3}. Slate [1, 0, 3]: DCG = 1/log2 2 + 1/log2 4 = 1.5;
        // ideal [1, 3, ..]: 1 + 1/log2 3 = 1.6309297535714575; nDCG = 0.9197207891481876.
        let clicked = [false, true, false, true, false];
        let n = ndcg(&[1, 0, 3], &clicked, 2, 3);
        assert!((n - 1.5 / (1.0 + 1.0 / 3f64.log2())).abs() < 1e-12, "{n}");
        assert!((n - 0.919_720_789_148_187_6).abs() < 1e-12, "value from CPython");
        assert!((ndcg(&[1, 3, 0], &clicked, 2, 3) - 1.0).abs() < 1e-12, "ideal order");
        assert_eq!(ndcg(&[0, 2, 4], &clicked, 2, 3).to_bits(), 0.0_f64.to_bits());
        // k = 1: only rank 1 counts; the ideal has one hit.
        assert!((ndcg(&[3], &clicked, 2, 1) - 1.0).abs() < 1e-12);
        assert!((recall(&[1, 0, 3], &clicked, 2) - 1.0).abs() < 1e-12);
        assert!((recall(&[1, 0], &clicked, 2) - 0.5).abs() < 1e-12);
        assert_eq!(recall(&[0], &[false, false], 0).to_bits(), 0.0_f64.to_bits());
        // A third clicked item that was never a candidate: the ideal ranks all three, so the
        // ideal order of the candidates no longer reaches 1. IDCG@3 = 1 + 1/log2 3 + 1/2.
        let n = ndcg(&[1, 3, 0], &clicked, 3, 3);
        assert!((n - (1.0 + 1.0 / 3f64.log2()) / (1.5 + 1.0 / 3f64.log2())).abs() < 1e-12, "{n}");
        assert!((recall(&[1, 3, 0], &clicked, 3) - 2.0 / 3.0).abs() < 1e-12);
        assert_eq!(reachable(&clicked), 2);
    }

    #[test]
    fn lambda_grids_and_pick_rules_parse() {
        assert_eq!(parse_lambdas("0:1:0.25").unwrap(), vec![0.0, 0.25, 0.5, 0.75, 1.0]);
        assert_eq!(parse_lambdas("0:1:0.1").unwrap().len(), 11);
        assert_eq!(parse_lambdas("0:1:0.1").unwrap()[3].to_bits(), 0.3_f64.to_bits());
        assert_eq!(parse_lambdas("0, 0.3,1").unwrap(), vec![0.0, 0.3, 1.0]);
        assert!(parse_lambdas("0,1.2").is_err());
        assert!(parse_lambdas("1:0:0.1").is_err());
        assert_eq!(parse_pick("ndcg>=0.95*baseline").unwrap(), PickRule { metric: "ndcg", factor: 0.95 });
        assert!(parse_pick("ndcg>0.95").is_err());
        assert_eq!(parse_pick("ndcg_reachable>=0.9*baseline").unwrap().metric, "ndcg_reachable");
        assert_eq!(parse_pick("recall_reachable>=0.9*baseline").unwrap().metric, "recall_reachable");
        assert!(parse_pick("mrr>=0.9*baseline").is_err());
    }
}

/// What `medley replay` was asked to do.
#[derive(Debug, Clone)]
pub struct Options {
    /// Algorithm names.
    pub algorithms: Vec<&'static dyn Diversifier>,
    /// Lambda grid.
    pub lambdas: Vec<f64>,
    /// Slate length.
    pub k: usize,
    /// Output directory for frontier.csv and frontier.svg.
    pub out: std::path::PathBuf,
    /// Optional `--pick` rule.
    pub pick: Option<PickRule>,
}

/// Runs the grid on `corpus`, writes `frontier.csv` and `frontier.svg` into `opts.out`, and
/// returns the report text (table, and the pick with its config snippet).
///
/// # Errors
/// I/O errors writing the outputs, or a kernel refusing a slate.
pub fn run(corpus: &Corpus, opts: &Options) -> anyhow::Result<String> {
    use anyhow::Context as _;
    use std::fmt::Write as _;
    let relevance = diversify::by_name("relevance").context("relevance is registered")?;
    let baseline = evaluate(corpus, relevance, 0.0, opts.k).map_err(anyhow::Error::msg)?;
    let cells: Vec<(&'static dyn Diversifier, f64)> =
        opts.algorithms.iter().flat_map(|&a| opts.lambdas.iter().map(move |&l| (a, l))).collect();
    let bar = indicatif::ProgressBar::new(cells.len() as u64);
    bar.set_style(
        indicatif::ProgressStyle::with_template("{bar:40} {pos}/{len} cells, {elapsed} elapsed, {eta} left")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    let mut points = Vec::with_capacity(cells.len());
    for (algorithm, lambda) in cells {
        points.push(evaluate(corpus, algorithm, lambda, opts.k).map_err(anyhow::Error::msg)?);
        bar.inc(1);
    }
    bar.finish_and_clear();

    std::fs::create_dir_all(&opts.out).with_context(|| format!("creating {}", opts.out.display()))?;
    let mut csv = String::from(CSV_HEADER);
    csv.push('\n');
    // The baseline row first, labelled as such, then every cell.
    let rows: Vec<(&str, &Point)> =
        std::iter::once(("baseline", &baseline)).chain(points.iter().map(|p| (p.algorithm, p))).collect();
    for &(label, p) in &rows {
        csv.push_str(&csv_row(label, p));
        csv.push('\n');
    }
    let csv_path = opts.out.join("frontier.csv");
    std::fs::write(&csv_path, csv).with_context(|| format!("writing {}", csv_path.display()))?;
    let svg = crate::replay_plot::render(&points, &baseline, opts.k).map_err(anyhow::Error::msg)?;
    let svg_path = opts.out.join("frontier.svg");
    std::fs::write(&svg_path, svg).with_context(|| format!("writing {}", svg_path.display()))?;

    let mut report = String::new();
    let k = opts.k;
    let _ = writeln!(report, "{} slates, {} items offered, k = {k}", corpus.len(), corpus.items);
    let _ = writeln!(
        report,
        "{:<10} {:>6} {:>9} {:>8} {:>16} {:>14} {:>9} {:>8} {:>6} {:>8} {:>8} {:>6}",
        "algorithm",
        "lambda",
        "recall@k",
        "nDCG@k",
        "recall_reachable",
        "ndcg_reachable",
        "retained",
        "entropy",
        "ILD",
        "distinct",
        "coverage",
        "gini"
    );
    for &(label, p) in &rows {
        let _ = writeln!(
            report,
            "{:<10} {:>6.2} {:>9.4} {:>8.4} {:>16.4} {:>14.4} {:>9.4} {:>8.3} {:>6.3} {:>8.2} {:>8.4} {:>6.3}",
            label,
            p.lambda,
            p.recall,
            p.ndcg,
            p.recall_reachable,
            p.ndcg_reachable,
            p.relevance_retained,
            p.entropy,
            p.ild,
            p.distinct,
            p.coverage,
            p.gini
        );
    }
    let _ = writeln!(report, "wrote {} and {}", csv_path.display(), svg_path.display());
    if let Some(rule) = &opts.pick {
        let floor = rule.factor * baseline.metric(rule.metric);
        let _ = writeln!(
            report,
            "\npick: {} >= {} x baseline ({:.4}); the most diverse lambda per algorithm:",
            rule.metric, rule.factor, floor
        );
        // Relevance ignores lambda; picking for it says nothing.
        let candidates: Vec<Point> = points.iter().filter(|p| p.algorithm != "relevance").cloned().collect();
        let picks = pick(&candidates, &baseline, rule);
        for (name, best) in &picks {
            match best {
                Some(p) => {
                    let _ = writeln!(
                        report,
                        "  {name:<10} lambda = {:<5} {} {:.4}, entropy {:.3} bits",
                        p.lambda,
                        rule.metric,
                        p.metric(rule.metric),
                        p.entropy
                    );
                }
                None => {
                    let _ = writeln!(report, "  {name:<10} no lambda keeps the bound");
                }
            }
        }
        let overall = picks.iter().filter_map(|(_, p)| *p).max_by(|a, b| a.entropy.total_cmp(&b.entropy));
        if let Some(p) = overall {
            let _ = writeln!(
                report,
                "\n# a slice serving the most diverse of these (edit the name):\n[slices.SLICE]\nalgorithm = \"{}\"\nlambda = {}\nk = {k}",
                p.algorithm, p.lambda
            );
        }
    }
    Ok(report)
}
