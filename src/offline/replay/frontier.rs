//! What is read off the grid's cells: the lambda grid and `--pick` rule parsers, the pick
//! itself, and the rows of `frontier.csv`. Shared by the report and the plot; a cell's means
//! ([`Point`]) come from [`medley_core::replay`].

pub use medley_core::replay::Point;

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
    /// `ndcg`, `recall`, `ndcg_reachable`, `recall_reachable`, `relevance_retained` or
    /// `alpha_ndcg`.
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
            "{text:?}: expected METRIC>=FACTOR*baseline with METRIC one of ndcg, recall, ndcg_reachable, recall_reachable, relevance_retained, alpha_ndcg"
        )
    };
    let (metric, rest) = text.split_once(">=").ok_or_else(expected)?;
    let metric = match metric.trim() {
        "ndcg" => "ndcg",
        "recall" => "recall",
        "ndcg_reachable" => "ndcg_reachable",
        "recall_reachable" => "recall_reachable",
        "relevance_retained" => "relevance_retained",
        "alpha_ndcg" => "alpha_ndcg",
        _ => return Err(expected()),
    };
    let factor = rest.trim().strip_suffix("*baseline").ok_or_else(expected)?;
    let factor: f64 = factor.trim().parse().map_err(|_| expected())?;
    Ok(PickRule { metric, factor })
}

impl PickRule {
    /// The per-slate column the rule constrains.
    #[must_use]
    pub fn column(&self) -> usize {
        use medley_core::replay::col;
        match self.metric {
            "recall" => col::RECALL,
            "ndcg_reachable" => col::NDCG_REACHABLE,
            "recall_reachable" => col::RECALL_REACHABLE,
            "relevance_retained" => col::RETAINED,
            "alpha_ndcg" => col::ALPHA_NDCG,
            _ => col::NDCG,
        }
    }
}

/// Per algorithm (and window), the most diverse point (highest mean entropy) among those for
/// which `holds` (the rule's non-inferiority test) is true; `None` for one with no such point.
#[must_use]
pub fn pick<'a>(
    points: &'a [Point],
    holds: &dyn Fn(usize) -> bool,
) -> Vec<(String, Option<(usize, &'a Point)>)> {
    let mut names: Vec<String> = Vec::new();
    for p in points {
        if !names.contains(&p.label()) {
            names.push(p.label());
        }
    }
    names
        .into_iter()
        .map(|name| {
            let best =
                points.iter().enumerate().filter(|&(i, p)| p.label() == name && holds(i)).max_by(
                    |(_, a), (_, b)| a.entropy.total_cmp(&b.entropy).then(b.lambda.total_cmp(&a.lambda)),
                );
            (name, best)
        })
        .collect()
}

/// The CSV header of `frontier.csv`: `algorithm,lambda,window`, then
/// [`medley_core::replay::REPORT_COLUMNS`].
pub const CSV_HEADER: &str = "algorithm,lambda,window,recall,ndcg,recall_reachable,ndcg_reachable,relevance_retained,entropy_bits,ild,distinct,coverage,gini,miscalibration,protected_share,ndcg_lo,ndcg_hi,entropy_lo,entropy_hi,ndcg_diff_lo,ndcg_diff_hi,ips_clicks,alpha_ndcg";

/// One CSV row; `label` fills the algorithm column (`baseline` for the baseline row). Values
/// are written in full (the shortest decimal that reads back to the same f64), so a program
/// comparing replays, or the Python package's table, sees the same numbers; an empty field is
/// a metric no slate had the input for.
#[must_use]
pub fn csv_row(label: &str, p: &Point) -> String {
    let mut row = format!("{label},{},{}", p.lambda, p.window.map_or_else(String::new, |w| w.to_string()));
    for v in p.values() {
        row.push(',');
        if let Some(v) = v {
            row.push_str(&v.to_string());
        }
    }
    row
}

#[cfg(test)]
mod tests {
    use super::*;

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

    #[test]
    fn the_csv_header_names_the_core_report_columns() {
        let want = format!("algorithm,lambda,window,{}", medley_core::replay::REPORT_COLUMNS.join(","));
        assert_eq!(CSV_HEADER, want);
    }
}
