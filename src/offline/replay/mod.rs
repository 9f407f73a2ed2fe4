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
//! Output: a table, `frontier.csv` and, through [`crate::offline::replay::plot`], `frontier.svg`.

mod evaluate;
mod frontier;
pub mod plot;
mod read;

pub use evaluate::{evaluate, evaluate_window};
pub use frontier::{csv_row, parse_lambdas, parse_pick, pick, PickRule, Point, CSV_HEADER};
pub use read::{read_corpus, Corpus, Slate};

use medley_core::diversify::{self, Diversifier};

/// What `medley replay` was asked to do.
#[derive(Debug, Clone)]
pub struct Options {
    /// Algorithm names.
    pub algorithms: Vec<&'static dyn Diversifier>,
    /// Lambda grid.
    pub lambdas: Vec<f64>,
    /// Windows for `dpp` and `ssd`: each adds a line of cells beside the unbounded one.
    pub windows: Vec<usize>,
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
    if opts.algorithms.iter().any(|a| a.needs_profile()) {
        let missing = corpus.without_profile();
        anyhow::ensure!(
            missing == 0,
            "calibrated needs a \"profile\" on every logged line; {missing} of {} lines have none (drop calibrated from --algorithms, or log profiles)",
            corpus.len()
        );
    }
    // Windows apply to the algorithms that take one; every algorithm runs unbounded too.
    let windows_of = |a: &dyn Diversifier| -> Vec<Option<usize>> {
        let mut w = vec![None];
        if a.takes_window() {
            w.extend(opts.windows.iter().map(|&w| Some(w)));
        }
        w
    };
    let cells: Vec<(&'static dyn Diversifier, Option<usize>, f64)> = opts
        .algorithms
        .iter()
        .flat_map(|&a| {
            windows_of(a).into_iter().flat_map(move |w| opts.lambdas.iter().map(move |&l| (a, w, l)))
        })
        .collect();
    let bar = indicatif::ProgressBar::new(cells.len() as u64);
    bar.set_style(
        indicatif::ProgressStyle::with_template("{bar:40} {pos}/{len} cells, {elapsed} elapsed, {eta} left")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    let mut points = Vec::with_capacity(cells.len());
    for (algorithm, window, lambda) in cells {
        points.push(evaluate_window(corpus, algorithm, lambda, opts.k, window).map_err(anyhow::Error::msg)?);
        bar.inc(1);
    }
    bar.finish_and_clear();

    std::fs::create_dir_all(&opts.out).with_context(|| format!("creating {}", opts.out.display()))?;
    let mut csv = String::from(CSV_HEADER);
    csv.push('\n');
    // The baseline row first, labelled as such, then every cell.
    // The CSV names the algorithm (its window has a column); the table names the line.
    let csv_rows = std::iter::once(("baseline", &baseline)).chain(points.iter().map(|p| (p.algorithm, p)));
    for (label, p) in csv_rows {
        csv.push_str(&csv_row(label, p));
        csv.push('\n');
    }
    let rows: Vec<(String, &Point)> = std::iter::once(("baseline".to_owned(), &baseline))
        .chain(points.iter().map(|p| (p.label(), p)))
        .collect();
    let csv_path = opts.out.join("frontier.csv");
    std::fs::write(&csv_path, csv).with_context(|| format!("writing {}", csv_path.display()))?;
    let svg = crate::offline::replay::plot::render(&points, &baseline, opts.k).map_err(anyhow::Error::msg)?;
    let svg_path = opts.out.join("frontier.svg");
    std::fs::write(&svg_path, svg).with_context(|| format!("writing {}", svg_path.display()))?;

    let mut report = String::new();
    let k = opts.k;
    let _ = writeln!(report, "{} slates, {} items offered, k = {k}", corpus.len(), corpus.items);
    // Miscalibration and the protected share only where some logged line had a profile or a
    // fairness floor (the CSV always has both columns).
    let show_miscal = rows.iter().any(|(_, p)| p.miscalibration.is_some());
    let show_share = rows.iter().any(|(_, p)| p.protected_share.is_some());
    let extra_header = |report: &mut String| {
        if show_miscal {
            let _ = write!(report, " {:>14}", "miscalibration");
        }
        if show_share {
            let _ = write!(report, " {:>15}", "protected_share");
        }
    };
    let extra_cells = |report: &mut String, p: &Point| {
        let cell = |x: Option<f64>| x.map_or_else(|| "-".to_owned(), |x| format!("{x:.4}"));
        if show_miscal {
            let _ = write!(report, " {:>14}", cell(p.miscalibration));
        }
        if show_share {
            let _ = write!(report, " {:>15}", cell(p.protected_share));
        }
    };
    let _ = write!(
        report,
        "{:<12} {:>6} {:>9} {:>8} {:>16} {:>14} {:>9} {:>8} {:>6} {:>8} {:>8} {:>6}",
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
    extra_header(&mut report);
    report.push('\n');
    for (label, p) in &rows {
        let _ = write!(
            report,
            "{:<12} {:>6.2} {:>9.4} {:>8.4} {:>16.4} {:>14.4} {:>9.4} {:>8.3} {:>6.3} {:>8.2} {:>8.4} {:>6.3}",
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
        extra_cells(&mut report, p);
        report.push('\n');
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
                        "  {name:<12} lambda = {:<5} {} {:.4}, entropy {:.3} bits",
                        p.lambda,
                        rule.metric,
                        p.metric(rule.metric),
                        p.entropy
                    );
                }
                None => {
                    let _ = writeln!(report, "  {name:<12} no lambda keeps the bound");
                }
            }
        }
        let overall = picks.iter().filter_map(|(_, p)| *p).max_by(|a, b| a.entropy.total_cmp(&b.entropy));
        if let Some(p) = overall {
            let _ = writeln!(
                report,
                "\n# a slice serving the most diverse of these (edit the name):\n[slices.SLICE]\nalgorithm = \"{}\"\nlambda = {}\nk = {k}{}",
                p.algorithm,
                p.lambda,
                p.window.map_or_else(String::new, |w| format!("\nwindow = {w}"))
            );
        }
    }
    Ok(report)
}
