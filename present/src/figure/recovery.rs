//! Figure 3: injection recovery. Panel (a): mean recovered A² against injected A² on
//! log-log axes with ±1 standard deviation bars and the identity line. Panel (b): detection
//! probability against injected amplitude at the chosen false-alarm probability, with
//! binomial 1σ bars. Panels sit side by side at double-column width and stacked at single.

use serde::Serialize;

use super::canvas::{
    bottom_gutter, draw_axes, draw_caption, draw_legend, left_gutter, legend_height, linear_ticks,
    log_ticks, wrap, Anchor, LegendItem, LineStyle, Marker, MarkerStyle, Rect, Sample, Scale,
    Stroke, Svg, BLACK, BLUE, CAPTION_LINE, FS_LABEL, FS_SMALL, INK, MUTED, VERMILLION,
};
use super::format::{self, Style};
use super::input::{InjectData, RECOVERY_CSV};
use super::null::pattern_words;
use super::{ColumnWidth, Drawn, FigureError, FigureOptions};

pub(crate) const STEM: &str = "injection-recovery";

const REC_MARKER: MarkerStyle = MarkerStyle {
    shape: Marker::Square,
    size: 3.8,
    fill: BLUE,
    stroke: "#FFFFFF",
};
const BELOW_MARKER: MarkerStyle = MarkerStyle {
    shape: Marker::TriangleDown,
    size: 3.8,
    fill: "#FFFFFF",
    stroke: BLUE,
};
const DET_MARKER: MarkerStyle = MarkerStyle {
    shape: Marker::Diamond,
    size: 3.8,
    fill: VERMILLION,
    stroke: "#FFFFFF",
};

#[derive(Serialize)]
struct SideRecovery {
    amplitude: f64,
    amplitude2_injected: f64,
    amplitude2_mean: f64,
    amplitude2_std: f64,
    /// "plotted", or "below_axis" when the mean is not positive and the point is drawn as a
    /// hollow triangle on the bottom edge.
    placement: &'static str,
}

#[derive(Serialize)]
struct SideDetection {
    amplitude: f64,
    detection_probability: f64,
    realizations: u64,
    /// Binomial 1σ: sqrt(p (1 - p) / realizations).
    error: f64,
}

#[derive(Serialize)]
struct Sidecar {
    figure: &'static str,
    source_folder: String,
    pattern: String,
    mode: String,
    false_alarm_probability: f64,
    detection_threshold_snr: f64,
    recovery: Vec<SideRecovery>,
    detection: Vec<SideDetection>,
    omitted_zero_rows: usize,
    panel_a_x_axis: [f64; 2],
    panel_a_y_axis: [f64; 2],
    panel_b_x_axis: [f64; 2],
    caption: String,
    size_in: [f64; 2],
    panel_a_box_pt: [f64; 4],
    panel_b_box_pt: [f64; 4],
    caption_box_pt: [f64; 4],
}

fn positive_range(values: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    for v in values.filter(|v| *v > 0.0 && v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    (lo <= hi).then_some((lo, hi))
}

pub(crate) fn draw(
    data: &InjectData,
    opts: &FigureOptions,
    stem: &str,
    source: &str,
) -> Result<Drawn, FigureError> {
    let rows: Vec<_> = data
        .rows
        .iter()
        .filter(|r| r.amplitude2_injected > 0.0 && r.amplitude > 0.0)
        .collect();
    if rows.is_empty() {
        return Err(FigureError::InvalidCell {
            path: data.dir.join(RECOVERY_CSV),
            line: 2,
            column: "amplitude".to_string(),
            reason: "no row has a positive injected amplitude to place on a log axis".to_string(),
        });
    }
    let omitted = data.rows.len() - rows.len();

    // Panel (a) ranges.
    let (xa_lo, xa_hi) =
        positive_range(rows.iter().map(|r| r.amplitude2_injected)).unwrap_or((1.0, 10.0));
    let ya = positive_range(rows.iter().flat_map(|r| {
        [
            r.amplitude2_injected,
            r.amplitude2_mean,
            r.amplitude2_mean + r.amplitude2_std,
            r.amplitude2_mean - r.amplitude2_std,
        ]
    }))
    .unwrap_or((xa_lo, xa_hi));
    // Common decades on both axes keep the identity line at 45 degrees.
    let (lo, hi) = (xa_lo.min(ya.0), xa_hi.max(ya.1));
    let ta = log_ticks(lo, hi);
    // Panel (b) ranges.
    let (xb_lo, xb_hi) = positive_range(rows.iter().map(|r| r.amplitude)).unwrap_or((1.0, 10.0));
    let tbx = log_ticks(xb_lo, xb_hi);
    let tby = linear_ticks(0.0, 1.0, 4, false);

    let recovery: Vec<SideRecovery> = rows
        .iter()
        .map(|r| SideRecovery {
            amplitude: r.amplitude,
            amplitude2_injected: r.amplitude2_injected,
            amplitude2_mean: r.amplitude2_mean,
            amplitude2_std: r.amplitude2_std,
            placement: if r.amplitude2_mean > 0.0 {
                "plotted"
            } else {
                "below_axis"
            },
        })
        .collect();
    let detection: Vec<SideDetection> = rows
        .iter()
        .map(|r| {
            let p = r.detection_probability;
            let n = r.realizations.max(1) as f64;
            SideDetection {
                amplitude: r.amplitude,
                detection_probability: p,
                realizations: r.realizations,
                error: (p * (1.0 - p) / n).sqrt(),
            }
        })
        .collect();

    let identity = Stroke::new(BLACK, 0.8, LineStyle::Dashed);
    let items = vec![
        LegendItem {
            label: "mean Â² ± 1 std".to_string(),
            sample: Sample::Marker(REC_MARKER, true),
        },
        LegendItem {
            label: "identity".to_string(),
            sample: Sample::Line(identity),
        },
        LegendItem {
            label: "detection probability ± 1σ".to_string(),
            sample: Sample::Marker(DET_MARKER, true),
        },
    ];
    let fap = format::compact(data.recovery.false_alarm_probability, 3, Style::Figure);

    let below = recovery
        .iter()
        .filter(|r| r.placement == "below_axis")
        .count();
    let target = if data.recovery.target.is_empty() {
        String::new()
    } else {
        format!(" ({})", data.recovery.target)
    };
    let mut caption = format!(
        "{} pattern, {} mode{target}, {} realizations per amplitude. (a) Error bars: ±1 standard deviation of Â² over realizations. (b) Detected means S/N ≥ {} (false-alarm probability {}); binomial 1σ bars.",
        pattern_words(&data.recovery.pattern),
        data.recovery.mode,
        data.recovery.realizations,
        format::fixed(data.recovery.detection_threshold_snr, 2, Style::Figure),
        fap,
    );
    if let Some(z) = data.rows.iter().find(|r| r.amplitude == 0.0) {
        caption.push_str(&format!(
            " With no injection the detection rate is {}.",
            format::compact(z.detection_probability, 3, Style::Figure)
        ));
    }
    if below > 0 {
        caption.push_str(&if below == 1 {
            " One amplitude with a non-positive mean is marked ▽ on the bottom edge.".to_string()
        } else {
            format!(" {below} amplitudes with a non-positive mean are marked ▽ on the bottom edge.")
        });
    }

    // Layout: panel sizes share one left gutter so that stacked panels align.
    let w = opts.width.inches() * 72.0;
    let pad = 4.0;
    let gutter = left_gutter(&ta)?.max(left_gutter(&tby)?);
    let (pa, pb, legend_w, leg_x, bottom) = {
        let right_margin = 9.0;
        match opts.width {
            ColumnWidth::Double => {
                let pw = (w - 2.0 * pad - 2.0 * gutter - right_margin - 10.0) / 2.0;
                let ph = pw * 0.72;
                let x1 = pad + gutter;
                let x2 = x1 + pw + 10.0 + gutter;
                let legend_w = w - pad - x1;
                let leg_h = legend_height(&items, legend_w)?;
                let y = pad + leg_h + 5.0;
                let pa = Rect {
                    x: x1,
                    y,
                    w: pw,
                    h: ph,
                };
                let pb = Rect {
                    x: x2,
                    y,
                    w: pw,
                    h: ph,
                };
                (pa, pb, legend_w, x1, y + ph + bottom_gutter())
            }
            ColumnWidth::Single => {
                let x = pad + gutter;
                let pw = w - right_margin - x;
                let ph = pw * 0.55;
                let legend_w = w - pad - x;
                let leg_h = legend_height(&items, legend_w)?;
                let y1 = pad + leg_h + 5.0;
                let y2 = y1 + ph + bottom_gutter() + 8.0;
                let pa = Rect {
                    x,
                    y: y1,
                    w: pw,
                    h: ph,
                };
                let pb = Rect {
                    x,
                    y: y2,
                    w: pw,
                    h: ph,
                };
                (pa, pb, legend_w, x, y2 + ph + bottom_gutter())
            }
        }
    };
    let lines = wrap(&caption, w - 2.0 * pad, FS_SMALL)?;
    let cap_y = bottom + 4.0;
    let h = cap_y + lines.len() as f64 * CAPTION_LINE + pad;

    let title = format!(
        "Injection recovery of the {} pattern",
        pattern_words(&data.recovery.pattern)
    );
    let mut svg = Svg::new(w, h, stem);

    // Panel (a).
    let xs = Scale::x(&ta, &pa, true);
    let ys = Scale::y(&ta, &pa, true);
    let clip_a = svg.clip(pa);
    draw_axes(
        &mut svg,
        pa,
        &xs,
        &ys,
        &ta,
        &ta,
        "injected A²",
        "recovered Â²",
    )?;
    svg.open("identity", Some(&clip_a), "");
    svg.line(
        xs.map(ta.lo),
        ys.map(ta.lo),
        xs.map(ta.hi),
        ys.map(ta.hi),
        &identity,
        "identity-line",
    );
    svg.close();
    svg.open("recovery", Some(&clip_a), "");
    let bar = Stroke::new(BLUE, 0.7, LineStyle::Solid);
    let clamp_y = |v: f64| ys.map(v.clamp(ta.lo, ta.hi));
    for r in &recovery {
        let x = xs.map(r.amplitude2_injected);
        svg.error_bar(
            x,
            clamp_y(r.amplitude2_mean - r.amplitude2_std),
            clamp_y(r.amplitude2_mean + r.amplitude2_std),
            1.3,
            &bar,
            "recovery-errorbar",
        );
    }
    for r in &recovery {
        let x = xs.map(r.amplitude2_injected);
        if r.placement == "plotted" {
            svg.marker(x, ys.map(r.amplitude2_mean), &REC_MARKER, "recovery-marker");
        } else {
            svg.marker(
                x,
                pa.bottom() - 2.6,
                &BELOW_MARKER,
                "recovery-marker below-axis",
            );
        }
    }
    svg.close();
    svg.text(
        "(a)",
        pa.x + 3.0,
        pa.y + FS_LABEL,
        FS_LABEL,
        Anchor::Start,
        INK,
        "panel-label",
    )?;

    // Panel (b).
    let xs = Scale::x(&tbx, &pb, true);
    let ys = Scale {
        lo: 0.0,
        hi: 1.0,
        log: false,
        a: pb.bottom(),
        b: pb.y,
    };
    let clip_b = svg.clip(Rect {
        x: pb.x,
        y: pb.y - 3.0,
        w: pb.w,
        h: pb.h + 6.0,
    });
    draw_axes(
        &mut svg,
        pb,
        &xs,
        &ys,
        &tbx,
        &tby,
        "injected amplitude A",
        "detection probability",
    )?;
    svg.open("detection", Some(&clip_b), "");
    let mut sorted: Vec<&SideDetection> = detection.iter().collect();
    sorted.sort_by(|a, b| a.amplitude.total_cmp(&b.amplitude));
    let pts: Vec<(f64, f64)> = sorted
        .iter()
        .map(|d| (xs.map(d.amplitude), ys.map(d.detection_probability)))
        .collect();
    svg.polyline(
        &pts,
        &Stroke::new(VERMILLION, 0.8, LineStyle::Solid),
        "detection-curve",
    );
    let dbar = Stroke::new(VERMILLION, 0.7, LineStyle::Solid);
    for d in &detection {
        let x = xs.map(d.amplitude);
        let (lo, hi) = (
            (d.detection_probability - d.error).max(0.0),
            (d.detection_probability + d.error).min(1.0),
        );
        svg.interval(x, &ys, lo, hi, 1.3, &dbar, "detection-errorbar");
    }
    for d in &detection {
        svg.marker(
            xs.map(d.amplitude),
            ys.map(d.detection_probability),
            &DET_MARKER,
            "detection-marker",
        );
    }
    svg.close();
    svg.text(
        "(b)",
        pb.x + 3.0,
        pb.y + FS_LABEL,
        FS_LABEL,
        Anchor::Start,
        INK,
        "panel-label",
    )?;
    svg.text(
        &format!(
            "false-alarm probability {fap}: S/N ≥ {}",
            format::fixed(data.recovery.detection_threshold_snr, 2, Style::Figure)
        ),
        pb.right() - 3.0,
        pb.bottom() - 4.0,
        FS_SMALL,
        Anchor::End,
        MUTED,
        "fap-label",
    )?;

    draw_legend(&mut svg, &items, leg_x, pad, legend_w)?;
    let cap_box = draw_caption(&mut svg, &lines, pad, cap_y)?;
    let svg_text = svg.finish(&title);

    let sidecar = Sidecar {
        figure: STEM,
        source_folder: source.to_string(),
        pattern: data.recovery.pattern.clone(),
        mode: data.recovery.mode.clone(),
        false_alarm_probability: data.recovery.false_alarm_probability,
        detection_threshold_snr: data.recovery.detection_threshold_snr,
        recovery,
        detection,
        omitted_zero_rows: omitted,
        panel_a_x_axis: [ta.lo, ta.hi],
        panel_a_y_axis: [ta.lo, ta.hi],
        panel_b_x_axis: [tbx.lo, tbx.hi],
        caption: caption.clone(),
        size_in: [w / 72.0, h / 72.0],
        panel_a_box_pt: pa.as_array(),
        panel_b_box_pt: pb.as_array(),
        caption_box_pt: cap_box.as_array(),
    };
    Drawn::new(stem, title, caption, svg_text, &sidecar)
}
