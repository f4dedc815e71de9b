//! The scaling figure of `benchmarks/run --full`: wall time of `correlate`, sky scrambles,
//! simulated nulls and injections against the number of pulsars, TOAs per pulsar and
//! frequencies (three log-log panels through the centre cell of the grid), with the fitted
//! power of each line (least squares of log time on log size). It reads the runner's
//! `scaling.csv` (`axis,value,task,time_s,fitted_power`, after a `#` line naming the machine,
//! its load and its BLAS build, which goes into the caption, and a `# measure wall` or
//! `# measure cpu` line saying which time it is).

use serde::Serialize;
use std::path::{Path, PathBuf};

use super::canvas::{
    bottom_gutter, draw_axes, draw_caption, draw_legend, left_gutter, legend_height, log_ticks,
    wrap, Anchor, LegendItem, LineStyle, Marker, MarkerStyle, Rect, Sample, Scale, Stroke, Svg,
    BLACK, BLUE, CAPTION_LINE, FS_SMALL, GREEN, INK, VERMILLION,
};
use super::{encode, sidecar_json, write_atomic, Drawn, FigureError, FigureFormat, FigureOptions};

pub(crate) const STEM: &str = "scaling";

/// The axes of the grid, in panel order, with their axis labels.
const AXES: [(&str, &str); 3] = [
    ("pulsars", "pulsars"),
    ("toas_per_pulsar", "TOAs per pulsar"),
    ("frequencies", "frequencies K"),
];

/// The tasks, in legend order, with their names and styles.
const TASKS: [(&str, &str, &str, Marker); 4] = [
    ("correlate", "correlate", BLACK, Marker::Circle),
    ("scrambles", "sky scrambles", BLUE, Marker::Square),
    ("simulated", "simulated nulls", GREEN, Marker::Diamond),
    ("injections", "injections", VERMILLION, Marker::TriangleDown),
];

/// One row of scaling.csv.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ScalingRow {
    pub axis: String,
    pub value: f64,
    pub task: String,
    pub time_s: f64,
    pub fitted_power: f64,
}

/// What a scaling.csv's times are.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Measure {
    Wall,
    Cpu,
}

/// Read scaling.csv: the machine line, the measure and the rows.
pub fn read_scaling(path: &Path) -> Result<(String, Measure, Vec<ScalingRow>), FigureError> {
    let text = std::fs::read_to_string(path).map_err(|source| FigureError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    let machine = text
        .lines()
        .next()
        .and_then(|l| l.strip_prefix('#'))
        .map(|l| l.trim().to_string())
        .unwrap_or_default();
    let measure = if text.lines().any(|l| l.trim() == "# measure cpu") {
        Measure::Cpu
    } else {
        Measure::Wall
    };
    let body: String = text
        .lines()
        .filter(|l| !l.starts_with('#'))
        .map(|l| format!("{l}\n"))
        .collect();
    let mut rdr = csv::Reader::from_reader(body.as_bytes());
    let mut rows = Vec::new();
    for (i, rec) in rdr.records().enumerate() {
        let rec = rec.map_err(|source| FigureError::Csv {
            path: path.to_path_buf(),
            source,
        })?;
        let bad = |field: &str, reason: String| FigureError::InvalidField {
            path: path.to_path_buf(),
            field: format!("row {} {field}", i + 1),
            reason,
        };
        if rec.len() != 5 {
            return Err(bad("", format!("expected 5 fields, found {}", rec.len())));
        }
        let num = |k: usize, field: &str| -> Result<f64, FigureError> {
            rec[k]
                .trim()
                .parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| bad(field, format!("`{}` is not a finite number", &rec[k])))
        };
        let row = ScalingRow {
            axis: rec[0].trim().to_string(),
            value: num(1, "value")?,
            task: rec[2].trim().to_string(),
            time_s: num(3, "time_s")?,
            fitted_power: num(4, "fitted_power")?,
        };
        if !AXES.iter().any(|(a, _)| *a == row.axis) {
            return Err(bad("axis", format!("unknown axis `{}`", row.axis)));
        }
        if !TASKS.iter().any(|(t, ..)| *t == row.task) {
            return Err(bad("task", format!("unknown task `{}`", row.task)));
        }
        if !(row.value > 0.0 && row.time_s > 0.0) {
            return Err(bad("time_s", "sizes and times must be positive".into()));
        }
        rows.push(row);
    }
    if rows.is_empty() {
        return Err(FigureError::InvalidField {
            path: path.to_path_buf(),
            field: "rows".into(),
            reason: "no measurements".into(),
        });
    }
    Ok((machine, measure, rows))
}

#[derive(Serialize)]
struct Sidecar<'a> {
    figure: &'static str,
    machine: &'a str,
    measure: Measure,
    rows: &'a [ScalingRow],
    caption: String,
    size_in: [f64; 2],
}

/// Draw the figure (three panels side by side, double-column width).
pub(crate) fn draw(
    machine: &str,
    measure: Measure,
    rows: &[ScalingRow],
) -> Result<Drawn, FigureError> {
    let what = match measure {
        Measure::Wall => "Wall time",
        Measure::Cpu => "CPU time (user + sys, all threads)",
    };
    let w = 7.0 * 72.0;
    let pad = 4.0;
    let items: Vec<LegendItem> = TASKS
        .iter()
        .filter(|(t, ..)| rows.iter().any(|r| r.task == *t))
        .map(|(_, name, color, shape)| LegendItem {
            label: name.to_string(),
            sample: Sample::Marker(
                MarkerStyle {
                    shape: *shape,
                    size: 3.6,
                    fill: color,
                    stroke: "#FFFFFF",
                },
                false,
            ),
        })
        .collect();
    let (lo, hi) = rows.iter().fold((f64::INFINITY, 0.0f64), |(l, h), r| {
        (l.min(r.time_s), h.max(r.time_s))
    });
    let yt = log_ticks(lo, hi);
    let gutter = left_gutter(&yt)?;
    let panel_w = (w - 2.0 * pad - 3.0 * gutter - 2.0 * 6.0) / 3.0;
    let leg_h = legend_height(&items, w - 2.0 * pad)?;
    let top = pad + leg_h + 5.0;
    let plot_h = panel_w * 0.9;
    let caption = format!(
        "{what} of each whole command against one size of the benchmark array, the other two \
         held at 100 pulsars, 10,000 TOAs per pulsar and 30 frequencies; the number beside each \
         line is its fitted power p (time ~ size^p, least squares in log-log). Scrambles, \
         simulated nulls and injections include reading and reducing the release. {machine}."
    );
    let lines = wrap(&caption, w - 2.0 * pad, FS_SMALL)?;
    let cap_y = top + plot_h + bottom_gutter() + 6.0;
    let h = cap_y + lines.len() as f64 * CAPTION_LINE + pad;
    let mut svg = Svg::new(w, h, STEM);
    draw_legend(&mut svg, &items, pad + gutter, pad, w - 2.0 * pad)?;
    for (k, (axis, label)) in AXES.iter().enumerate() {
        let plot = Rect {
            x: pad + gutter + k as f64 * (panel_w + gutter + 6.0),
            y: top,
            w: panel_w,
            h: plot_h,
        };
        let on: Vec<&ScalingRow> = rows.iter().filter(|r| r.axis == *axis).collect();
        let (xl, xh) = on.iter().fold((f64::INFINITY, 0.0f64), |(l, h), r| {
            (l.min(r.value), h.max(r.value))
        });
        let xt = log_ticks(xl, xh);
        let xs = Scale::x(&xt, &plot, true);
        let ys = Scale::y(&yt, &plot, true);
        let ylabel = match (k, measure) {
            (0, Measure::Wall) => "wall time (s)",
            (0, Measure::Cpu) => "CPU time (s)",
            _ => "",
        };
        draw_axes(&mut svg, plot, &xs, &ys, &xt, &yt, label, ylabel)?;
        svg.open("series", None, "");
        for (task, _, color, shape) in TASKS {
            let mut pts: Vec<(f64, f64, f64)> = on
                .iter()
                .filter(|r| r.task == task)
                .map(|r| (r.value, r.time_s, r.fitted_power))
                .collect();
            if pts.is_empty() {
                continue;
            }
            pts.sort_by(|a, b| a.0.total_cmp(&b.0));
            let page: Vec<(f64, f64)> = pts.iter().map(|p| (xs.map(p.0), ys.map(p.1))).collect();
            svg.polyline(&page, &Stroke::new(color, 0.9, LineStyle::Solid), task);
            let m = MarkerStyle {
                shape,
                size: 3.6,
                fill: color,
                stroke: "#FFFFFF",
            };
            for (x, y) in &page {
                svg.marker(*x, *y, &m, task);
            }
            let (x, y) = page[page.len() - 1];
            svg.text(
                &format!("{:.2}", pts[0].2),
                x + 3.0,
                y + FS_SMALL * 0.35,
                FS_SMALL,
                Anchor::Start,
                color,
                "fitted-power",
            )?;
        }
        svg.close();
    }
    let _ = draw_caption(&mut svg, &lines, pad, cap_y)?;
    let _ = INK;
    let title = format!("{what} against array size (benchmarks/run)");
    let sidecar = sidecar_json(
        &Sidecar {
            figure: STEM,
            machine,
            measure,
            rows,
            caption: caption.clone(),
            size_in: [w / 72.0, h / 72.0],
        },
        STEM,
    )?;
    Ok(Drawn {
        stem: STEM.to_string(),
        title: title.clone(),
        caption,
        svg: svg.finish(&title),
        sidecar,
    })
}

/// Draw the scaling figure of a `benchmarks/run` scaling.csv into `out_dir` as
/// `scaling.svg`, `scaling.png` and the sidecar `scaling.json`; returns the files written.
pub fn plot_scaling(csv_path: &Path, out_dir: &Path) -> Result<Vec<PathBuf>, FigureError> {
    let (machine, measure, rows) = read_scaling(csv_path)?;
    let d = draw(&machine, measure, &rows)?;
    std::fs::create_dir_all(out_dir).map_err(|source| FigureError::Write {
        path: out_dir.to_path_buf(),
        source,
    })?;
    let opts = FigureOptions::default();
    let mut written = Vec::new();
    for f in [FigureFormat::Svg, FigureFormat::Png] {
        let path = out_dir.join(format!("{STEM}.{}", f.extension()));
        write_atomic(&path, &encode(&d, f, &opts)?)?;
        written.push(path);
    }
    let path = out_dir.join(format!("{STEM}.json"));
    write_atomic(&path, d.sidecar.as_bytes())?;
    written.push(path);
    Ok(written)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn draws_three_panels_with_fitted_powers() {
        let dir = ptacorr::testing::temp_dir("scaling");
        let csv = dir.join("scaling.csv");
        let mut text = String::from(
            "# test machine, load 1.0\n# measure cpu\naxis,value,task,time_s,fitted_power\n",
        );
        for (axis, xs) in [
            ("pulsars", [20.0, 50.0, 100.0, 200.0]),
            ("toas_per_pulsar", [1e3, 1e4, 5e4, 1e5]),
            ("frequencies", [14.0, 30.0, 60.0, 90.0]),
        ] {
            for (task, p) in [("correlate", 1.0), ("scrambles", 2.0)] {
                for x in xs {
                    text.push_str(&format!(
                        "{axis},{x},{task},{},{p}\n",
                        1e-3 * f64::powf(x, p)
                    ));
                }
            }
        }
        std::fs::write(&csv, text).unwrap();
        let files = plot_scaling(&csv, &dir).unwrap();
        assert_eq!(files.len(), 3);
        let svg = std::fs::read_to_string(dir.join("scaling.svg")).unwrap();
        assert!(svg.contains("aria-label=\"2.00\""), "fitted power drawn");
        assert!(svg.contains("test machine"), "caption names the machine");
        assert!(svg.contains("CPU time (s)"), "the measure labels the axis");
        std::fs::write(
            &csv,
            "# m\naxis,value,task,time_s,fitted_power\npulsars,1,warp,1,1\n",
        )
        .unwrap();
        assert!(plot_scaling(&csv, &dir).is_err(), "unknown task refused");
        std::fs::remove_dir_all(&dir).ok();
    }
}
