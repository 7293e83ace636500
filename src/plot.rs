//! SVG plots: training curves, samples beside data, and weighted samples over a density.
//!
//! Text is left to the SVG viewer (no fonts are bundled), so the files stay small and
//! portable.

use std::path::Path;

use plotters::prelude::*;

use crate::error::{Error, Result};
use crate::tabular::table::Table;
use crate::tabular::train::History;

fn plot_err(e: impl std::fmt::Display) -> Error {
    Error::Plot(e.to_string())
}

fn finish(svg: String, path: &Path) -> Result<()> {
    crate::util::fs::write_atomic(path, svg.as_bytes())
}

fn range(v: impl Iterator<Item = f64>) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for x in v.filter(|x| x.is_finite()) {
        lo = lo.min(x);
        hi = hi.max(x);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    let pad = ((hi - lo) * 0.05).max(1e-9);
    (lo - pad, hi + pad)
}

/// Train and validation ELBO per epoch (per row divided by `dims`, standardised units).
///
/// # Errors
/// [`Error::Io`] if the file cannot be written.
pub fn elbo_curve_svg(history: &History, dims: usize, path: impl AsRef<Path>) -> Result<()> {
    elbo_curves_svg(&[history], dims, path)
}

/// As [`elbo_curve_svg`] for the models of an ensemble. With several models each has its
/// own colour, labelled with its number in the file (from 1): its validation curve thick,
/// its training curve thin and pale.
///
/// # Errors
/// [`Error::Io`] if the file cannot be written.
pub fn elbo_curves_svg(histories: &[&History], dims: usize, path: impl AsRef<Path>) -> Result<()> {
    let d = dims.max(1) as f64;
    let several = histories.len() > 1;
    let mut curves = Vec::new();
    for (m, history) in histories.iter().enumerate() {
        let train: Vec<(f64, f64)> = history
            .epochs
            .iter()
            .map(|r| (r.epoch as f64, r.train_elbo / d))
            .collect();
        let val: Vec<(f64, f64)> = history
            .epochs
            .iter()
            .filter_map(|r| r.val_elbo.map(|v| (r.epoch as f64, v / d)))
            .collect();
        if several {
            // The model's label goes with its thick curve, or with its only one.
            let labelled = val.is_empty();
            curves.push(Curve {
                label: labelled.then(|| format!("model {}", m + 1)),
                points: train,
                colour: m,
                thin: !labelled,
            });
            if !val.is_empty() {
                curves.push(Curve {
                    label: Some(format!("model {}", m + 1)),
                    points: val,
                    colour: m,
                    thin: false,
                });
            }
        } else {
            curves.push(Curve::plain("training", train, 0));
            if !val.is_empty() {
                curves.push(Curve::plain("validation", val, 1));
            }
        }
    }
    let title = if several {
        "ELBO per dimension by epoch (standardised units; thick: validation, thin: training)"
    } else {
        "ELBO per dimension by epoch (standardised units)"
    };
    draw_curves(
        title,
        "epoch",
        "ELBO / dimension (nats)",
        &curves,
        path.as_ref(),
    )
}

/// Line curves sharing one pair of axes, with a legend. The first tenth of each curve is
/// left out of the vertical range so that early, very low values do not flatten the rest.
///
/// # Errors
/// [`Error::Io`] if the file cannot be written.
pub fn curves_svg(
    title: &str,
    x_label: &str,
    y_label: &str,
    series: &[(&str, Vec<(f64, f64)>)],
    path: impl AsRef<Path>,
) -> Result<()> {
    let curves: Vec<Curve> = series
        .iter()
        .enumerate()
        .map(|(i, (label, points))| Curve::plain(label, points.clone(), i))
        .collect();
    draw_curves(title, x_label, y_label, &curves, path.as_ref())
}

/// One line of [`draw_curves`].
struct Curve {
    /// Its legend entry, if any.
    label: Option<String>,
    points: Vec<(f64, f64)>,
    /// Index into the palette (cycled).
    colour: usize,
    /// Drawn thin and pale, beside the thick ones.
    thin: bool,
}

impl Curve {
    fn plain(label: &str, points: Vec<(f64, f64)>, colour: usize) -> Self {
        Self {
            label: Some(label.to_string()),
            points,
            colour,
            thin: false,
        }
    }
}

fn draw_curves(
    title: &str,
    x_label: &str,
    y_label: &str,
    curves: &[Curve],
    path: &Path,
) -> Result<()> {
    let (x0, x1) = range(curves.iter().flat_map(|c| c.points.iter().map(|p| p.0)));
    let (y0, y1) = range(
        curves
            .iter()
            .flat_map(|c| c.points.iter().skip(c.points.len() / 10).map(|p| p.1)),
    );
    // Eight distinct colours: the models of a default fit (up to four members, each with
    // up to two fits).
    let colours = [
        BLUE,
        RED,
        GREEN,
        MAGENTA,
        CYAN,
        RGBColor(230, 140, 0),
        RGBColor(120, 70, 20),
        RGBColor(110, 110, 110),
    ];
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (720, 440)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_err)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 16))
            .margin(12)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(x0..x1, y0..y1)
            .map_err(plot_err)?;
        chart
            .configure_mesh()
            .x_desc(x_label)
            .y_desc(y_label)
            .draw()
            .map_err(plot_err)?;
        // Thin curves first, so that the thick ones stay on top.
        let order = curves
            .iter()
            .filter(|c| c.thin)
            .chain(curves.iter().filter(|c| !c.thin));
        for curve in order {
            let c = colours[curve.colour % colours.len()];
            let style = if curve.thin {
                c.mix(0.35).stroke_width(1)
            } else {
                c.stroke_width(2)
            };
            let drawn = chart
                .draw_series(LineSeries::new(curve.points.iter().copied(), style))
                .map_err(plot_err)?;
            if let Some(label) = &curve.label {
                drawn
                    .label(label.as_str())
                    .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], c));
            }
        }
        chart
            .configure_series_labels()
            .border_style(BLACK)
            .background_style(WHITE.mix(0.8))
            .position(SeriesLabelPosition::LowerRight)
            .draw()
            .map_err(plot_err)?;
        root.present().map_err(plot_err)?;
    }
    finish(svg, path)
}

fn histogram(values: &[f64], lo: f64, hi: f64, bins: usize) -> Vec<f64> {
    let mut h = vec![0.0; bins];
    let w = (hi - lo) / bins as f64;
    let mut n = 0.0;
    // Missing cells (NaN) are left out.
    for &v in values.iter().filter(|v| !v.is_nan()) {
        let i = (((v - lo) / w).floor() as isize).clamp(0, bins as isize - 1) as usize;
        h[i] += 1.0;
        n += 1.0;
    }
    let n = f64::max(n, 1.0);
    h.iter().map(|c| c / (n * w)).collect()
}

/// Level frequencies of a categorical column with `levels` levels (missing cells left out).
fn frequencies(values: &[f64], levels: usize) -> Vec<f64> {
    let mut f = vec![0.0; levels];
    let seen: Vec<usize> = values
        .iter()
        .filter(|v| !v.is_nan())
        .map(|&v| v as usize)
        .collect();
    for &l in &seen {
        if let Some(c) = f.get_mut(l) {
            *c += 1.0 / seen.len() as f64;
        }
    }
    f
}

/// A categorical column's level frequencies as bars: generated rows (blue) beside the data
/// (grey).
fn bar_chart(
    area: &DrawingArea<SVGBackend<'_>, plotters::coord::Shift>,
    name: &str,
    levels: &[String],
    generated: &[f64],
    data: Option<&[f64]>,
) -> Result<()> {
    let k = levels.len();
    let fs = frequencies(generated, k);
    let fd = data.map(|d| frequencies(d, k)).unwrap_or_default();
    let top = fs.iter().chain(&fd).copied().fold(0.0, f64::max) * 1.1 + 1e-12;
    let mut chart = ChartBuilder::on(area)
        .margin(6)
        .caption(name, ("sans-serif", 13))
        .x_label_area_size(18)
        .y_label_area_size(10)
        .build_cartesian_2d(-0.5..k as f64 - 0.5, 0.0..top)
        .map_err(plot_err)?;
    let labels: Vec<String> = levels
        .iter()
        .map(|l| l.chars().take(12).collect())
        .collect();
    chart
        .configure_mesh()
        .disable_mesh()
        .y_labels(0)
        .x_labels(k.min(12))
        .x_label_formatter(&|x| {
            let i = x.round();
            if (x - i).abs() < 1e-6 && i >= 0.0 && (i as usize) < labels.len() {
                labels[i as usize].clone()
            } else {
                String::new()
            }
        })
        .draw()
        .map_err(plot_err)?;
    if !fd.is_empty() {
        chart
            .draw_series(fd.iter().enumerate().map(|(l, &v)| {
                Rectangle::new(
                    [(l as f64 - 0.4, 0.0), (l as f64, v)],
                    BLACK.mix(0.4).filled(),
                )
            }))
            .map_err(plot_err)?;
    }
    chart
        .draw_series(fs.iter().enumerate().map(|(l, &v)| {
            Rectangle::new(
                [(l as f64, 0.0), (l as f64 + 0.4, v)],
                BLUE.mix(0.7).filled(),
            )
        }))
        .map_err(plot_err)?;
    Ok(())
}

/// Marginal histograms (diagonal; bar charts of level frequencies for categorical columns)
/// and pairwise scatter plots (off-diagonal; categorical cells at their level's index) of up
/// to the first `max_columns` columns: generated rows in blue, `data` (if given) in grey.
///
/// # Errors
/// [`Error::Io`] if the file cannot be written.
pub fn pairs_svg(
    samples: &Table,
    data: Option<&Table>,
    max_columns: usize,
    path: impl AsRef<Path>,
) -> Result<()> {
    // The first columns, then up to two categorical columns from further on.
    let mut chosen: Vec<usize> = (0..samples.n_cols().min(max_columns.max(1))).collect();
    chosen.extend(
        (chosen.len()..samples.n_cols())
            .filter(|&j| samples.kinds()[j].is_categorical())
            .take(2),
    );
    let k = chosen.len();
    let cell = 220u32;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (cell * k as u32, cell * k as u32 + 30))
            .into_drawing_area();
        root.fill(&WHITE).map_err(plot_err)?;
        let (title, body) = root.split_vertically(30);
        title
            .draw(&Text::new(
                "generated rows (blue) beside the data (grey)",
                (10, 8),
                ("sans-serif", 16).into_font(),
            ))
            .map_err(plot_err)?;
        let cells = body.split_evenly((k, k));
        let cols: Vec<Vec<f64>> = chosen.iter().map(|&j| samples.column(j)).collect();
        let dcols: Option<Vec<Vec<f64>>> =
            data.map(|d| chosen.iter().map(|&j| d.column(j)).collect());
        let ranges: Vec<(f64, f64)> = (0..k)
            .map(|j| {
                let extra = dcols.as_ref().map(|c| c[j].clone()).unwrap_or_default();
                range(cols[j].iter().copied().chain(extra))
            })
            .collect();
        // At most 500 points per cloud keep the file small.
        let thin = |n: usize| n.div_ceil(500).max(1);
        for (idx, area) in cells.iter().enumerate() {
            let (i, j) = (idx / k, idx % k);
            let (x0, x1) = ranges[j];
            if i == j && samples.kinds()[chosen[j]].is_categorical() {
                let levels = samples.kinds()[chosen[j]].levels().unwrap_or(&[]);
                let d = dcols.as_ref().map(|c| c[j].as_slice());
                bar_chart(area, &samples.columns()[chosen[j]], levels, &cols[j], d)?;
            } else if i == j {
                let bins = 30;
                let hs = histogram(&cols[j], x0, x1, bins);
                let hd = dcols
                    .as_ref()
                    .map(|c| histogram(&c[j], x0, x1, bins))
                    .unwrap_or_default();
                let top = hs.iter().chain(&hd).copied().fold(0.0, f64::max) * 1.1 + 1e-12;
                let mut chart = ChartBuilder::on(area)
                    .margin(6)
                    .caption(&samples.columns()[chosen[j]], ("sans-serif", 13))
                    .x_label_area_size(18)
                    .y_label_area_size(10)
                    .build_cartesian_2d(x0..x1, 0.0..top)
                    .map_err(plot_err)?;
                chart
                    .configure_mesh()
                    .disable_mesh()
                    .y_labels(0)
                    .x_labels(3)
                    .draw()
                    .map_err(plot_err)?;
                let w = (x1 - x0) / bins as f64;
                let step = |h: &[f64]| -> Vec<(f64, f64)> {
                    h.iter()
                        .enumerate()
                        .flat_map(|(b, &v)| [(x0 + b as f64 * w, v), (x0 + (b + 1) as f64 * w, v)])
                        .collect()
                };
                if !hd.is_empty() {
                    chart
                        .draw_series(LineSeries::new(step(&hd), BLACK.mix(0.5).stroke_width(2)))
                        .map_err(plot_err)?;
                }
                chart
                    .draw_series(LineSeries::new(step(&hs), BLUE.stroke_width(2)))
                    .map_err(plot_err)?;
            } else {
                let (y0, y1) = ranges[i];
                let mut chart = ChartBuilder::on(area)
                    .margin(6)
                    .x_label_area_size(18)
                    .y_label_area_size(30)
                    .build_cartesian_2d(x0..x1, y0..y1)
                    .map_err(plot_err)?;
                chart
                    .configure_mesh()
                    .disable_mesh()
                    .x_labels(3)
                    .y_labels(3)
                    .draw()
                    .map_err(plot_err)?;
                if let Some(dc) = &dcols {
                    let s = thin(dc[j].len());
                    chart
                        .draw_series(
                            dc[j]
                                .iter()
                                .zip(&dc[i])
                                .step_by(s)
                                .map(|(&x, &y)| Circle::new((x, y), 1, BLACK.mix(0.35).filled())),
                        )
                        .map_err(plot_err)?;
                }
                let s = thin(cols[j].len());
                chart
                    .draw_series(
                        cols[j]
                            .iter()
                            .zip(&cols[i])
                            .step_by(s)
                            .map(|(&x, &y)| Circle::new((x, y), 1, BLUE.mix(0.45).filled())),
                    )
                    .map_err(plot_err)?;
            }
        }
        root.present().map_err(plot_err)?;
    }
    finish(svg, path.as_ref())
}

/// A 2-D density as filled bands (darker = higher; ten levels of the normalised density)
/// with weighted samples on top (dot opacity proportional to the normalised weight).
///
/// `log_density` is evaluated on a 120 × 120 grid over `[lo, hi]²`.
///
/// # Errors
/// [`Error::Io`] if the file cannot be written.
pub fn density_samples_svg(
    log_density: &dyn Fn(f64, f64) -> f64,
    samples: &[Vec<f64>],
    log_weights: &[f64],
    (lo, hi): (f64, f64),
    title: &str,
    path: impl AsRef<Path>,
) -> Result<()> {
    let n = 120;
    let w = (hi - lo) / n as f64;
    let mut grid = vec![0.0; n * n];
    for a in 0..n {
        for b in 0..n {
            grid[a * n + b] = log_density(lo + (a as f64 + 0.5) * w, lo + (b as f64 + 0.5) * w);
        }
    }
    let max = grid.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let lw_max = log_weights
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (560, 560)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_err)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 16))
            .margin(10)
            .x_label_area_size(30)
            .y_label_area_size(40)
            .build_cartesian_2d(lo..hi, lo..hi)
            .map_err(plot_err)?;
        chart
            .configure_mesh()
            .disable_mesh()
            .draw()
            .map_err(plot_err)?;
        chart
            .draw_series((0..n * n).filter_map(|k| {
                let level = ((grid[k] - max).exp() * 10.0).floor() / 10.0;
                (level > 0.0).then(|| {
                    let (a, b) = (k / n, k % n);
                    let (x, y) = (lo + a as f64 * w, lo + b as f64 * w);
                    Rectangle::new(
                        [(x, y), (x + w, y + w)],
                        RGBColor(255, 140, 0).mix(0.15 + 0.6 * level).filled(),
                    )
                })
            }))
            .map_err(plot_err)?;
        let step = (samples.len() / 3000).max(1);
        chart
            .draw_series(
                samples
                    .iter()
                    .zip(log_weights)
                    .step_by(step)
                    .filter_map(|(x, lw)| {
                        let a = (lw - lw_max).exp();
                        (x.len() >= 2)
                            .then(|| Circle::new((x[0], x[1]), 2, BLUE.mix(0.1 + 0.8 * a).filled()))
                    }),
            )
            .map_err(plot_err)?;
        root.present().map_err(plot_err)?;
    }
    finish(svg, path.as_ref())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tabular::train::EpochRecord;

    fn history(validation: bool) -> History {
        let epochs = (1..=5)
            .map(|e| EpochRecord {
                epoch: e,
                step: e as u64,
                train_elbo: -1.0 / e as f64,
                val_elbo: validation.then(|| -1.5 / e as f64),
                control_cost: 0.0,
                reconstruction: 0.0,
                learning_rate: 1e-3,
                grad_norm: 1.0,
                seconds: 0.1,
            })
            .collect();
        History { epochs }
    }

    fn drawn(histories: &[&History]) -> String {
        let path = std::env::temp_dir().join(format!(
            "nsde-plot-{}-{}.svg",
            std::process::id(),
            histories.len()
        ));
        elbo_curves_svg(histories, 2, &path).unwrap();
        let svg = std::fs::read_to_string(&path).unwrap();
        std::fs::remove_file(&path).unwrap();
        svg
    }

    /// The lines of `svg` that are exactly `text` (plotters writes each label on its own line).
    fn labels(svg: &str, text: &str) -> usize {
        svg.lines().filter(|l| l.trim() == text).count()
    }

    // Common practice, no source: one legend entry per model, the line weight telling the
    // two curves apart.
    #[test]
    fn several_models_get_one_legend_entry_each() {
        let (a, b) = (history(true), history(false));
        let svg = drawn(&[&a, &b]);
        assert!(svg.contains("thick: validation"), "{svg}");
        assert_eq!(labels(&svg, "model 1"), 1, "{svg}");
        assert_eq!(labels(&svg, "model 2"), 1, "{svg}");
        assert_eq!(labels(&svg, "training"), 0, "{svg}");
        let one = drawn(&[&a]);
        assert_eq!(labels(&one, "training"), 1, "{one}");
        assert_eq!(labels(&one, "validation"), 1, "{one}");
        assert!(!one.contains("model 1"), "{one}");
    }
}
