//! The control chart in an alert email: the last subgroups' means with the centre line, the
//! control limits, the specification limits, and the points of the alert marked, drawn with
//! plotters into a PNG.

use plotters::prelude::*;

use crate::alerts::Alert;
use crate::engine::CharView;
use crate::format::num;

const WIDTH: u32 = 760;
const HEIGHT: u32 = 380;

/// The font the charts are labelled with (DejaVu Sans; its licence is beside it in assets/).
static FONT: &[u8] = include_bytes!("../../../assets/fonts/DejaVuSans.ttf");

fn font_ready() -> bool {
    static READY: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *READY.get_or_init(|| {
        plotters::style::register_font("sans-serif", FontStyle::Normal, FONT).is_ok()
    })
}

/// Draws the chart of `c` with the points of `alerts` marked; a PNG file's bytes.
pub fn png(c: &CharView, alerts: &[&Alert]) -> Result<Vec<u8>, String> {
    if c.recent.is_empty() {
        return Err("no subgroups to draw yet".into());
    }
    if !font_ready() {
        return Err("the chart font did not load".into());
    }
    let mut rgb = vec![0u8; (WIDTH * HEIGHT * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut rgb, (WIDTH, HEIGHT)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        let first = c.recent.first().map_or(0, |s| s.number);
        let last = c.recent.last().map_or(1, |s| s.number).max(first + 1);
        let mut lo = f64::INFINITY;
        let mut hi = f64::NEG_INFINITY;
        let mut include = |v: f64| {
            if v.is_finite() {
                lo = lo.min(v);
                hi = hi.max(v);
            }
        };
        for s in &c.recent {
            include(s.mean);
        }
        if let Some(l) = c.location {
            include(l.ucl);
            include(l.lcl);
        }
        if let Some(sp) = c.spec {
            sp.lsl.map(&mut include);
            sp.usl.map(&mut include);
        }
        let pad = ((hi - lo) * 0.08).max(1e-9);
        let (lo, hi) = (lo - pad, hi + pad);
        let title = format!("{} ({}): subgroup means", c.name, c.id);
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(32)
            .y_label_area_size(72)
            .right_y_label_area_size(8)
            .build_cartesian_2d(first as f64 - 0.5..last as f64 + 0.5, lo..hi)
            .map_err(|e| e.to_string())?;
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_desc("subgroup")
            .y_desc(c.unit.as_str())
            .x_label_formatter(&|x| format!("{}", x.round() as i64))
            .y_label_formatter(&|y| num(*y))
            .label_style(("sans-serif", 12))
            .draw()
            .map_err(|e| e.to_string())?;
        let (x0, x1) = (first as f64 - 0.5, last as f64 + 0.5);
        let mut hline =
            |y: f64, color: RGBColor, label: String, dashed: bool| -> Result<(), String> {
                let style = color.stroke_width(if dashed { 1 } else { 2 });
                if dashed {
                    let mut x = x0;
                    let step = (x1 - x0) / 60.0;
                    while x < x1 {
                        chart
                            .draw_series(LineSeries::new(
                                [(x, y), ((x + step * 0.6).min(x1), y)],
                                style,
                            ))
                            .map_err(|e| e.to_string())?;
                        x += step;
                    }
                } else {
                    chart
                        .draw_series(LineSeries::new([(x0, y), (x1, y)], style))
                        .map_err(|e| e.to_string())?;
                }
                chart
                    .draw_series(std::iter::once(Text::new(
                        format!("{label} {}", num(y)),
                        (x0 + (x1 - x0) * 0.01, y),
                        ("sans-serif", 12).into_font().color(&color),
                    )))
                    .map_err(|e| e.to_string())?;
                Ok(())
            };
        let red = RGBColor(200, 30, 30);
        let green = RGBColor(20, 130, 60);
        let purple = RGBColor(120, 60, 170);
        if let Some(l) = c.location {
            hline(l.center, green, "CL".into(), false)?;
            hline(l.ucl, red, "UCL".into(), false)?;
            hline(l.lcl, red, "LCL".into(), false)?;
        }
        if let Some(sp) = c.spec {
            if let Some(u) = sp.usl {
                hline(u, purple, "USL".into(), true)?;
            }
            if let Some(l) = sp.lsl {
                hline(l, purple, "LSL".into(), true)?;
            }
        }
        let blue = RGBColor(30, 80, 160);
        chart
            .draw_series(LineSeries::new(
                c.recent.iter().map(|s| (s.number as f64, s.mean)),
                blue.stroke_width(2),
            ))
            .map_err(|e| e.to_string())?;
        let marked: std::collections::HashSet<u64> = alerts
            .iter()
            .filter(|a| a.level == crate::alerts::Level::Subgroup)
            .flat_map(|a| a.points.iter().map(|p| p.number))
            .collect();
        chart
            .draw_series(c.recent.iter().map(|s| {
                let at = (s.number as f64, s.mean);
                if marked.contains(&s.number) {
                    Circle::new(at, 6, red.filled())
                } else {
                    Circle::new(at, 3, blue.filled())
                }
            }))
            .map_err(|e| e.to_string())?;
        root.present().map_err(|e| e.to_string())?;
    }
    let mut out = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut out, WIDTH, HEIGHT);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let mut w = enc.write_header().map_err(|e| e.to_string())?;
        w.write_image_data(&rgb).map_err(|e| e.to_string())?;
    }
    Ok(out)
}
