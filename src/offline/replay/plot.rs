//! `frontier.svg`: the accuracy–diversity plane of a replay, drawn with plotters (SVG backend).
//!
//! x is mean category entropy (bits), y is nDCG@k. Each algorithm is one line through its lambdas
//! in order, every point labelled with its lambda, and the line's name is written at its last
//! point, so the plot reads without a legend. The relevance baseline is a separate black square
//! labelled "relevance baseline"; every algorithm starts there, at lambda 0. Whiskers through
//! each point span its 95 % bootstrap intervals: vertical for nDCG, horizontal for entropy.

use plotters::prelude::*;

use super::frontier::Point;

/// Colours for up to ten lines (algorithms, and their windows), then repeated.
const COLOURS: [RGBColor; 10] = [
    RGBColor(31, 119, 180),
    RGBColor(214, 39, 40),
    RGBColor(44, 160, 44),
    RGBColor(148, 103, 189),
    RGBColor(255, 127, 14),
    RGBColor(23, 190, 207),
    RGBColor(140, 86, 75),
    RGBColor(227, 119, 194),
    RGBColor(127, 127, 127),
    RGBColor(188, 189, 34),
];

/// Renders the frontier as an SVG document.
///
/// # Errors
/// A drawing error from plotters, as text.
pub fn render(points: &[Point], baseline: &Point, k: usize) -> Result<String, String> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (900, 640)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        let (mut x0, mut x1, mut y0, mut y1) =
            (baseline.entropy, baseline.entropy, baseline.ndcg, baseline.ndcg);
        for p in points.iter().chain(std::iter::once(baseline)) {
            x0 = x0.min(p.entropy_lo.min(p.entropy));
            x1 = x1.max(p.entropy_hi.max(p.entropy));
            y0 = y0.min(p.ndcg_lo.min(p.ndcg));
            y1 = y1.max(p.ndcg_hi.max(p.ndcg));
        }
        let pad = |lo: f64, hi: f64| {
            let m = ((hi - lo) * 0.08).max(0.01);
            (lo - m, hi + m)
        };
        let ((x0, x1), (y0, y1)) = (pad(x0, x1), pad(y0, y1));
        let mut chart = ChartBuilder::on(&root)
            .caption(format!("Accuracy–diversity frontier (k = {k})"), ("sans-serif", 22))
            .margin(20)
            .x_label_area_size(45)
            .y_label_area_size(60)
            .build_cartesian_2d(x0..x1, y0..y1)
            .map_err(|e| e.to_string())?;
        chart
            .configure_mesh()
            .x_desc("mean category entropy of the slate (bits)")
            .y_desc(format!("nDCG@{k}"))
            .draw()
            .map_err(|e| e.to_string())?;
        let mut names: Vec<String> = Vec::new();
        for p in points {
            if !names.contains(&p.label()) {
                names.push(p.label());
            }
        }
        for (c, name) in names.iter().enumerate() {
            let colour = COLOURS[c % COLOURS.len()];
            let mut line: Vec<&Point> = points.iter().filter(|p| p.label() == *name).collect();
            line.sort_by(|a, b| a.lambda.total_cmp(&b.lambda));
            chart
                .draw_series(LineSeries::new(
                    line.iter().map(|p| (p.entropy, p.ndcg)),
                    colour.stroke_width(2),
                ))
                .map_err(|e| e.to_string())?;
            chart
                .draw_series(line.iter().map(|p| Circle::new((p.entropy, p.ndcg), 4, colour.filled())))
                .map_err(|e| e.to_string())?;
            chart.draw_series(line.iter().flat_map(|p| whiskers(p, colour))).map_err(|e| e.to_string())?;
            // Lambda labels sit just above-right of their point; lambda 0 coincides with the
            // baseline for every algorithm, whose label says so once.
            chart
                .draw_series(line.iter().filter(|p| p.lambda > 0.0).map(|p| {
                    EmptyElement::at((p.entropy, p.ndcg))
                        + Text::new(
                            format!("λ={}", p.lambda),
                            (6, -14),
                            ("sans-serif", 12).into_font().color(&colour),
                        )
                }))
                .map_err(|e| e.to_string())?;
            if let Some(last) = line.last() {
                chart
                    .draw_series(std::iter::once(
                        EmptyElement::at((last.entropy, last.ndcg))
                            + Text::new(
                                name.to_string(),
                                (8, 4),
                                ("sans-serif", 16).into_font().color(&colour),
                            ),
                    ))
                    .map_err(|e| e.to_string())?;
            }
        }
        chart.draw_series(whiskers(baseline, BLACK)).map_err(|e| e.to_string())?;
        chart
            .draw_series(std::iter::once(Rectangle::new(
                [
                    (baseline.entropy - (x1 - x0) * 0.006, baseline.ndcg - (y1 - y0) * 0.009),
                    (baseline.entropy + (x1 - x0) * 0.006, baseline.ndcg + (y1 - y0) * 0.009),
                ],
                BLACK.filled(),
            )))
            .map_err(|e| e.to_string())?;
        chart
            .draw_series(std::iter::once(
                EmptyElement::at((baseline.entropy, baseline.ndcg))
                    + Text::new(
                        "relevance baseline (every algorithm at λ = 0)",
                        (10, -22),
                        ("sans-serif", 14),
                    ),
            ))
            .map_err(|e| e.to_string())?;
        root.present().map_err(|e| e.to_string())?;
    }
    Ok(svg)
}

/// The 95 % interval whiskers of one point (NaN ends, from an empty bootstrap, draw nothing).
fn whiskers(p: &Point, colour: RGBColor) -> Vec<PathElement<(f64, f64)>> {
    let style = colour.mix(0.6).stroke_width(1);
    let mut out = Vec::new();
    if p.ndcg_lo.is_finite() && p.ndcg_hi.is_finite() {
        out.push(PathElement::new(vec![(p.entropy, p.ndcg_lo), (p.entropy, p.ndcg_hi)], style));
    }
    if p.entropy_lo.is_finite() && p.entropy_hi.is_finite() {
        out.push(PathElement::new(vec![(p.entropy_lo, p.ndcg), (p.entropy_hi, p.ndcg)], style));
    }
    out
}
