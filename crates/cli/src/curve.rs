//! The training curves as one SVG picture: people read a curve faster than a column
//! of numbers. Hand-written SVG: three small line charts, no dependency needed.

use std::fmt::Write;

use tagweave_suggest::TrainingHistory;

const PANEL_W: f64 = 300.0;
const PANEL_H: f64 = 220.0;
const MARGIN: f64 = 44.0;
const COLOURS: [&str; 3] = ["#1f5f8b", "#c8553d", "#588b3f"];
/// Height of the title band above the panels.
const TITLE_H: f64 = 30.0;
/// Height of a panel's frame, with its title above and axis label below.
const PLOT_H: f64 = PANEL_H - 22.0 - 48.0;
/// Distance between legend lines, and room below the last line for its letters' tails.
const LEGEND_LINE: f64 = 12.0;
const BOTTOM_ROOM: f64 = 8.0;

struct Series<'a> {
    label: String,
    values: &'a [f32],
}

struct Panel<'a> {
    title: &'a str,
    y_label: &'a str,
    series: Vec<Series<'a>>,
    /// Epoch to mark with a vertical line (the one kept).
    mark: Option<usize>,
}

/// The picture for one training run's history.
pub fn render(history: &TrainingHistory, kept_epochs: usize) -> String {
    let mut pretraining: Vec<Series> = history
        .pretraining
        .iter()
        .map(|(layer, errors)| Series {
            label: format!("{layer} layer"),
            values: errors,
        })
        .collect();
    pretraining.truncate(COLOURS.len());
    let panels = [
        Panel {
            title: "1. RBM pretraining",
            y_label: "reconstruction error",
            series: pretraining,
            mark: None,
        },
        Panel {
            title: "2. fine-tuning",
            y_label: "training loss per picture",
            series: vec![
                Series {
                    label: "validation run".into(),
                    values: &history.choosing_loss,
                },
                Series {
                    label: "final run".into(),
                    values: &history.final_loss,
                },
            ],
            mark: None,
        },
        Panel {
            title: "3. held-out pictures",
            y_label: "tag ranking (LRAP)",
            series: vec![Series {
                label: format!("kept epoch {kept_epochs}"),
                values: &history.validation_lrap,
            }],
            mark: kept_epochs.checked_sub(1),
        },
    ];
    let width = PANEL_W * panels.len() as f64;
    // Tall enough for the longest legend (the pretraining panel lists three layers).
    let legend_lines = panels.iter().map(|p| p.series.len()).max().unwrap_or(0);
    let height = (TITLE_H + PANEL_H).max(
        legend_top(TITLE_H) + LEGEND_LINE * legend_lines.saturating_sub(1) as f64 + BOTTOM_ROOM,
    );
    let mut svg = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{width}\" height=\"{h}\" \
         viewBox=\"0 0 {width} {h}\" font-family=\"sans-serif\" font-size=\"11\">\n\
         <rect width=\"100%\" height=\"100%\" fill=\"white\"/>\n",
        h = height
    );
    let _ = writeln!(
        svg,
        "<text x=\"8\" y=\"16\" font-size=\"13\">tagweave training on {} pictures, {:.0} s</text>",
        history.pictures, history.seconds
    );
    for (i, panel) in panels.iter().enumerate() {
        draw_panel(&mut svg, panel, i as f64 * PANEL_W, TITLE_H);
    }
    svg.push_str("</svg>\n");
    svg
}

/// Baseline of a panel's first legend line, for a panel whose top is at `y0`.
fn legend_top(y0: f64) -> f64 {
    y0 + 22.0 + PLOT_H + 28.0
}

fn draw_panel(svg: &mut String, panel: &Panel, x0: f64, y0: f64) {
    let (left, top) = (x0 + MARGIN, y0 + 22.0);
    let (w, h) = (PANEL_W - MARGIN - 12.0, PLOT_H);
    let _ = writeln!(
        svg,
        "<text x=\"{left}\" y=\"{}\" font-weight=\"bold\">{}</text>",
        y0 + 12.0,
        panel.title
    );
    let values = panel.series.iter().flat_map(|s| s.values.iter().copied());
    let (lo, hi) = values
        .filter(|v| v.is_finite())
        .fold((f32::INFINITY, f32::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        });
    let _ = writeln!(
        svg,
        "<rect x=\"{left}\" y=\"{top}\" width=\"{w}\" height=\"{h}\" fill=\"none\" stroke=\"#999\"/>"
    );
    if lo > hi {
        let _ = writeln!(
            svg,
            "<text x=\"{}\" y=\"{}\" fill=\"#666\">nothing recorded</text>",
            left + 8.0,
            top + h / 2.0
        );
        return;
    }
    let span = if hi > lo { hi - lo } else { 1.0 };
    let epochs = panel
        .series
        .iter()
        .map(|s| s.values.len())
        .max()
        .unwrap_or(1)
        .max(2);
    let px = |e: usize| left + w * e as f64 / (epochs - 1) as f64;
    let py = |v: f32| top + h * f64::from((hi - v) / span);
    for (v, anchor_y) in [(hi, top + 4.0), (lo, top + h)] {
        let _ = writeln!(
            svg,
            "<text x=\"{}\" y=\"{anchor_y}\" text-anchor=\"end\">{}</text>",
            left - 4.0,
            short(v)
        );
    }
    let _ = writeln!(
        svg,
        "<text x=\"{}\" y=\"{}\" text-anchor=\"middle\">epoch (1–{epochs})</text>",
        left + w / 2.0,
        top + h + 14.0
    );
    let _ = writeln!(
        svg,
        "<text transform=\"translate({} {}) rotate(-90)\" text-anchor=\"middle\">{}</text>",
        x0 + 12.0,
        top + h / 2.0,
        panel.y_label
    );
    if let Some(e) = panel.mark.filter(|&e| e < epochs) {
        let _ = writeln!(
            svg,
            "<line x1=\"{x}\" x2=\"{x}\" y1=\"{top}\" y2=\"{}\" stroke=\"#888\" stroke-dasharray=\"4 3\"/>",
            top + h,
            x = px(e)
        );
    }
    for (i, series) in panel.series.iter().enumerate() {
        let colour = COLOURS[i % COLOURS.len()];
        let points: Vec<String> = series
            .values
            .iter()
            .enumerate()
            .filter(|(_, v)| v.is_finite())
            .map(|(e, &v)| format!("{:.1},{:.1}", px(e), py(v)))
            .collect();
        let _ = writeln!(
            svg,
            "<polyline fill=\"none\" stroke=\"{colour}\" stroke-width=\"1.5\" points=\"{}\"/>",
            points.join(" ")
        );
        let _ = writeln!(
            svg,
            "<text x=\"{}\" y=\"{}\" fill=\"{colour}\">{}</text>",
            left,
            legend_top(y0) + LEGEND_LINE * i as f64,
            series.label
        );
    }
}

/// The number after the first `prefix` in `text` (test helper).
#[cfg(test)]
fn number_after(text: &str, prefix: &str) -> f64 {
    let start = text.find(prefix).map(|i| i + prefix.len()).unwrap_or(0);
    let rest = &text[start..];
    let end = rest.find('"').unwrap_or(rest.len());
    rest[..end].parse().unwrap_or(f64::NAN)
}

fn short(v: f32) -> String {
    if v.abs() >= 100.0 {
        format!("{v:.0}")
    } else {
        format!("{v:.3}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_picture_is_well_formed_svg_with_one_line_per_series() {
        let history = TrainingHistory {
            pretraining: vec![
                ("image".into(), vec![1.0, 0.8, 0.7]),
                ("tags".into(), vec![0.3, 0.2, 0.1]),
            ],
            choosing_loss: vec![5.0, 3.0, 2.0, 1.5],
            validation_lrap: vec![0.2, 0.4, 0.45, 0.44],
            final_loss: vec![5.0, 2.9, 1.9],
            pictures: 12,
            seconds: 3.0,
        };
        let svg = render(&history, 3);
        assert!(svg.starts_with("<svg") && svg.trim_end().ends_with("</svg>"));
        assert_eq!(svg.matches("<polyline").count(), 5);
        assert!(svg.contains("kept epoch 3"));
        assert!(svg.contains("stroke-dasharray"), "kept epoch marked");
        // every opened element is closed or self-closed
        let opened = svg.matches("<text").count();
        assert_eq!(opened, svg.matches("</text>").count());
        // every text line, the last legend line of three included, lies inside the picture
        let three = TrainingHistory {
            pretraining: vec![
                ("image".into(), vec![1.0, 0.8]),
                ("tags".into(), vec![0.3, 0.2]),
                ("shared".into(), vec![0.2, 0.1]),
            ],
            ..history
        };
        let svg = render(&three, 2);
        let height = number_after(&svg, "height=\"");
        let lowest = svg
            .match_indices("<text x=")
            .map(|(at, _)| number_after(&svg[at..], " y=\""))
            .fold(0.0, f64::max);
        assert!(svg.contains(">shared layer</text>"));
        assert!(
            lowest + 3.0 <= height,
            "a line at y {lowest} in a picture {height} high"
        );
        let empty = render(&TrainingHistory::default(), 0);
        assert_eq!(empty.matches("nothing recorded").count(), 3);
    }
}
