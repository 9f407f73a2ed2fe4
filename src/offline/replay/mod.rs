//! `medley replay`: logged requests with their clicks, re-ranked by every (algorithm, lambda),
//! scored for accuracy and diversity with confidence intervals, so each slice's `lambda` is
//! chosen on evidence.
//!
//! Input is the corpus format or the exposure log that `medley serve` writes, as files or a
//! directory, plain or zstd ([`Reader`]), with clicks inline or joined from `--clicks`. One
//! streaming pass evaluates every cell of the grid on each chunk of slates ([`add_chunk`] into a [`Grid`]), so
//! memory does not grow with the number of slates. Per cell it reports:
//! - accuracy: recall@k and nDCG@k (binary gains, log2 discount) in their textbook form, whose
//!   ideal and denominator count every item the line logs as clicked, offered or not; the same
//!   two restricted to the clicked items among the candidates (`recall_reachable`,
//!   `ndcg_reachable`); relevance retained (Σ normalised score of the slate ÷ Σ of the
//!   relevance top-k); α-nDCG@k (categories as subtopics); and, where lines logged the served
//!   slate, position-debiased clicks@k (`ips_clicks`);
//! - diversity: mean category entropy (bits), mean intra-list distance, mean distinct categories,
//!   and over all slates the item coverage and the Gini coefficient of item exposure;
//! - uncertainty: 95 % Poisson-bootstrap intervals of mean nDCG@k and mean entropy, and a paired
//!   interval of the nDCG difference from the baseline ([`medley_core::bootstrap`]).
//!
//! `--pick` keeps a cell only when it is non-inferior to the baseline by the paired interval,
//! then refines the chosen lambda by bisection (three more passes over the input).
//!
//! Output: a table, `frontier.csv` and, through [`crate::offline::replay::plot`], `frontier.svg`.

mod evaluate;
mod frontier;
pub mod plot;
mod read;

pub use evaluate::add_chunk;
pub use frontier::{csv_row, parse_lambdas, parse_pick, pick, PickRule, Point, CSV_HEADER};
pub use medley_core::replay::{col, Cell, Grid, GridOptions, LoggedSlate};
pub use read::{list_inputs, Clicks, ReadStats, Reader, Slate, CHUNK_BYTES, CHUNK_LINES};

use std::path::Path;
use std::sync::atomic::Ordering;

use anyhow::Context as _;
use medley_core::diversify::{self, Diversifier};

use crate::serve::engine::Engine;

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
    /// `--propensity-eta`: examination propensity `(1/r)^eta` of the IPS estimate.
    pub eta: f64,
    /// `--ips-clip`: largest IPS weight.
    pub clip: f64,
    /// Show a progress bar on stderr (when it is a terminal).
    pub progress: bool,
}

/// α of the α-nDCG column (Clarke et al. 2008 use 0.5).
pub const ALPHA: f64 = 0.5;

/// One streaming pass of `grid` over the input files.
///
/// # Errors
/// I/O errors, a kernel refusing a slate, or `calibrated` in the grid meeting a line without a
/// profile.
pub fn pass(
    grid: &mut Grid,
    engine: &Engine,
    files: &[std::path::PathBuf],
    clicks: Option<&Clicks>,
    needs_profile: bool,
    progress: bool,
) -> anyhow::Result<ReadStats> {
    let total: u64 = files.iter().filter_map(|f| std::fs::metadata(f).ok()).map(|m| m.len()).sum();
    let bar = if progress { indicatif::ProgressBar::new(total) } else { indicatif::ProgressBar::hidden() };
    bar.set_style(
        indicatif::ProgressStyle::with_template(
            "{bar:40} {bytes}/{total_bytes} {msg}, {elapsed} elapsed, {eta} left",
        )
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    let started = std::time::Instant::now();
    let mut reader = Reader::new(engine, files.to_vec(), clicks);
    while let Some(chunk) = reader.next_chunk()? {
        if needs_profile {
            if let Some(s) = chunk.iter().find(|s| s.input.profile().is_none()) {
                anyhow::bail!(
                    "calibrated needs a \"profile\" on every logged line; line {} (counted over all input files) has none (drop calibrated from --algorithms, or log profiles)",
                    s.line
                );
            }
        }
        add_chunk(grid, &chunk, reader.stats.items).map_err(anyhow::Error::msg)?;
        bar.set_position(reader.bytes_read.load(Ordering::Relaxed));
        let rate = reader.stats.slates as f64 / started.elapsed().as_secs_f64().max(1e-9);
        bar.set_message(format!("{} slates, {rate:.0} slates/s", reader.stats.slates));
    }
    bar.finish_and_clear();
    Ok(reader.stats)
}

/// Evaluates `cells` over logged lines held in memory, in one pass: the points (the baseline
/// first) and what reading counted. For tests and embedding; `medley replay` streams files.
///
/// # Errors
/// As [`add_chunk`], or I/O errors.
pub fn evaluate_lines(
    engine: &Engine,
    lines: &[u8],
    cells: &[Cell],
    opts: GridOptions,
) -> anyhow::Result<(Vec<Point>, ReadStats)> {
    let mut grid = Grid::new(cells, opts).map_err(anyhow::Error::msg)?;
    let mut reader = Reader::over(engine, Box::new(std::io::Cursor::new(lines.to_vec())), "<lines>", None);
    while let Some(chunk) = reader.next_chunk()? {
        add_chunk(&mut grid, &chunk, reader.stats.items).map_err(anyhow::Error::msg)?;
    }
    Ok((grid.points(), reader.stats))
}

/// Runs the grid over `input` (a file or directory), writes `frontier.csv` and `frontier.svg`
/// into `opts.out`, and returns the report text (table, and the pick with its config snippet).
///
/// # Errors
/// I/O errors reading the input or writing the outputs, no usable line, or a kernel refusing a
/// slate.
pub fn run(engine: &Engine, input: &Path, clicks: Option<&Clicks>, opts: &Options) -> anyhow::Result<String> {
    use std::fmt::Write as _;
    let files = list_inputs(input)?;
    let cells = medley_core::replay::grid_cells(&opts.algorithms, &opts.windows, &opts.lambdas);
    let gopts = GridOptions {
        k: opts.k,
        eta: opts.eta,
        clip: opts.clip,
        alpha: ALPHA,
        pick_column: opts.pick.map_or(col::NDCG, |r| r.column()),
    };
    let needs_profile = opts.algorithms.iter().any(|a| a.needs_profile());
    let mut grid = Grid::new(&cells, gopts).map_err(anyhow::Error::msg)?;
    let stats = pass(&mut grid, engine, &files, clicks, needs_profile, opts.progress)?;
    anyhow::ensure!(
        stats.slates > 0,
        "no usable line in {} ({} lines: {} without clicks, {} invalid); each needs embeddings (or a catalog) and clicks",
        input.display(),
        stats.lines,
        stats.without_clicks,
        stats.invalid
    );
    let all = grid.points();
    let baseline = all[0].clone();
    let points = &all[1..];

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
    let csv_path = opts.out.join("frontier.csv");
    std::fs::write(&csv_path, csv).with_context(|| format!("writing {}", csv_path.display()))?;
    let svg = crate::offline::replay::plot::render(points, &baseline, opts.k).map_err(anyhow::Error::msg)?;
    let svg_path = opts.out.join("frontier.svg");
    std::fs::write(&svg_path, svg).with_context(|| format!("writing {}", svg_path.display()))?;

    let mut report = String::new();
    let k = opts.k;
    let _ = writeln!(
        report,
        "{} slates, {} items offered, k = {k}; {} of {} lines skipped without clicks, {} invalid",
        stats.slates, stats.items, stats.without_clicks, stats.lines, stats.invalid
    );
    for (at, why) in &stats.first_invalid {
        let _ = writeln!(report, "  skipped {at}: {why}");
    }
    for at in &stats.partial_last_lines {
        let _ = writeln!(report, "  skipped a partial last line at {at} (a write cut short)");
    }
    report.push_str(&table(&baseline, points));
    let _ = writeln!(
        report,
        "intervals: 95 % Poisson bootstrap, {} replicates",
        medley_core::bootstrap::REPLICATES
    );
    let _ = writeln!(report, "wrote {} and {}", csv_path.display(), svg_path.display());
    if let Some(rule) = &opts.pick {
        report.push_str(&pick_report(&grid, &all, rule, opts, |mut g| {
            pass(&mut g, engine, &files, clicks, needs_profile, opts.progress).map(|_| g)
        })?);
    }
    Ok(report)
}

/// The table: one row per cell, interval ends beside their means (named as the CSV names them).
fn table(baseline: &Point, points: &[Point]) -> String {
    use std::fmt::Write as _;
    let rows: Vec<(String, &Point)> = std::iter::once(("baseline".to_owned(), baseline))
        .chain(points.iter().map(|p| (p.label(), p)))
        .collect();
    // Miscalibration, the protected share and IPS clicks only where some logged line had a
    // profile, a fairness floor or the served slate (the CSV always has the columns).
    let show_miscal = rows.iter().any(|(_, p)| p.miscalibration.is_some());
    let show_share = rows.iter().any(|(_, p)| p.protected_share.is_some());
    let show_ips = rows.iter().any(|(_, p)| p.ips_clicks.is_some());
    let mut report = String::new();
    let _ = write!(
        report,
        "{:<12} {:>6} {:>9} {:>8} {:>8} {:>8} {:>12} {:>12} {:>14} {:>9} {:>8} {:>10} {:>10} {:>6} {:>8} {:>8} {:>6} {:>10}",
        "algorithm",
        "lambda",
        "recall@k",
        "nDCG@k",
        "ndcg_lo",
        "ndcg_hi",
        "ndcg_diff_lo",
        "ndcg_diff_hi",
        "ndcg_reachable",
        "retained",
        "entropy",
        "entropy_lo",
        "entropy_hi",
        "ILD",
        "distinct",
        "coverage",
        "gini",
        "alpha_ndcg"
    );
    let cell = |x: Option<f64>| x.map_or_else(|| "-".to_owned(), |x| format!("{x:.4}"));
    if show_ips {
        let _ = write!(report, " {:>10}", "ips_clicks");
    }
    if show_miscal {
        let _ = write!(report, " {:>14}", "miscalibration");
    }
    if show_share {
        let _ = write!(report, " {:>15}", "protected_share");
    }
    report.push('\n');
    for (label, p) in &rows {
        let _ = write!(
            report,
            "{:<12} {:>6.2} {:>9.4} {:>8.4} {:>8.4} {:>8.4} {:>+12.4} {:>+12.4} {:>14.4} {:>9.4} {:>8.3} {:>10.3} {:>10.3} {:>6.3} {:>8.2} {:>8.4} {:>6.3} {:>10.4}",
            label,
            p.lambda,
            p.recall,
            p.ndcg,
            p.ndcg_lo,
            p.ndcg_hi,
            p.ndcg_diff_lo,
            p.ndcg_diff_hi,
            p.ndcg_reachable,
            p.relevance_retained,
            p.entropy,
            p.entropy_lo,
            p.entropy_hi,
            p.ild,
            p.distinct,
            p.coverage,
            p.gini,
            p.alpha_ndcg
        );
        if show_ips {
            let _ = write!(report, " {:>10}", cell(p.ips_clicks));
        }
        if show_miscal {
            let _ = write!(report, " {:>14}", cell(p.miscalibration));
        }
        if show_share {
            let _ = write!(report, " {:>15}", cell(p.protected_share));
        }
        report.push('\n');
    }
    report
}

/// Bisection steps after the grid pick.
pub const REFINE_STEPS: usize = 3;

/// The `--pick` section: per line of cells the most diverse non-inferior cell, then the overall
/// choice refined by bisection toward the next lambda of the grid, and its slice config.
/// `rerun` runs a one-cell grid over the input again.
fn pick_report(
    grid: &Grid,
    all: &[Point],
    rule: &PickRule,
    opts: &Options,
    rerun: impl Fn(Grid) -> anyhow::Result<Grid>,
) -> anyhow::Result<String> {
    use std::fmt::Write as _;
    let mut report = String::new();
    let baseline = &all[0];
    let _ = writeln!(
        report,
        "\npick: {} >= {} x baseline ({:.4}), non-inferior when the lower end of the paired 95 % interval of {}_cell - {} x {}_baseline is >= 0; the most diverse lambda per algorithm:",
        rule.metric,
        rule.factor,
        rule.factor * baseline.metric(rule.metric),
        rule.metric,
        rule.factor,
        rule.metric
    );
    // Relevance ignores lambda (and is the baseline); picking for it says nothing.
    let holds = |i: usize| i > 0 && all[i].algorithm != "relevance" && grid.pick_bound(i, rule.factor) >= 0.0;
    let picks = pick(all, &holds);
    for (name, best) in &picks {
        if name == "relevance" {
            continue;
        }
        match best {
            Some((i, p)) => {
                let _ = writeln!(
                    report,
                    "  {name:<12} lambda = {:<5} {} {:.4} (paired lower bound {:+.4}), entropy {:.3} bits",
                    p.lambda,
                    rule.metric,
                    p.metric(rule.metric),
                    grid.pick_bound(*i, rule.factor),
                    p.entropy
                );
            }
            None => {
                let _ = writeln!(report, "  {name:<12} no lambda is shown to keep the bound");
            }
        }
    }
    let overall =
        picks.iter().filter_map(|(_, p)| *p).max_by(|(_, a), (_, b)| a.entropy.total_cmp(&b.entropy));
    let Some((_, chosen)) = overall else { return Ok(report) };
    let mut lambda = chosen.lambda;
    let next = opts.lambdas.iter().copied().filter(|&l| l > chosen.lambda).min_by(f64::total_cmp);
    if let Some(next) = next {
        let algorithm = diversify::by_name(chosen.algorithm).context("a registered algorithm")?;
        let (mut lo, mut hi) = (chosen.lambda, next);
        let _ = writeln!(
            report,
            "\nrefining {} between lambda {lo} and {hi} by bisection ({REFINE_STEPS} more passes):",
            chosen.label()
        );
        for _ in 0..REFINE_STEPS {
            let mid = ((lo + hi) / 2.0 * 1e6).round() / 1e6;
            let cell = Cell { algorithm, window: chosen.window, lambda: mid };
            let gopts = GridOptions {
                k: opts.k,
                eta: opts.eta,
                clip: opts.clip,
                alpha: ALPHA,
                pick_column: rule.column(),
            };
            let g = rerun(Grid::new(&[cell], gopts).map_err(anyhow::Error::msg)?)?;
            let bound = g.pick_bound(1, rule.factor);
            let p = &g.points()[1];
            let keeps = bound >= 0.0;
            let _ = writeln!(
                report,
                "  lambda = {mid:<8} {} {:.4} (paired lower bound {bound:+.4}), entropy {:.3}: {}",
                rule.metric,
                p.metric(rule.metric),
                p.entropy,
                if keeps { "keeps the bound" } else { "does not" }
            );
            if keeps {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        lambda = lo;
        let _ = writeln!(report, "refined lambda = {lambda}");
    } else {
        let _ = writeln!(
            report,
            "\n{} keeps the bound at the grid's largest lambda; nothing to refine",
            chosen.label()
        );
    }
    let _ = writeln!(
        report,
        "\n# a slice serving the most diverse of these (edit the name):\n[slices.SLICE]\nalgorithm = \"{}\"\nlambda = {lambda}\nk = {}{}",
        chosen.algorithm,
        opts.k,
        chosen.window.map_or_else(String::new, |w| format!("\nwindow = {w}"))
    );
    Ok(report)
}
