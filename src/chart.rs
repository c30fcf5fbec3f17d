//! Control-chart pictures: one drawing for every place a chart appears (the alert email now;
//! the command line, the report and the page draw through the same [`Picture`]). A picture
//! is built from plain data, then drawn by plotters on its bitmap backend (PNG) or its SVG
//! backend.
//!
//! What a picture shows, and how it stays readable:
//! * both charts of the characteristic, one above the other: the location chart (subgroup
//!   means, or readings) and the spread chart (ranges, standard deviations or moving ranges);
//! * the centre line and control limits, stepped where subgroup sizes differ; the 1σ and 2σ
//!   lines when zone rules are on; specification limits only where single readings are
//!   plotted (specifications apply to parts, not to means);
//! * the points of the alerts marked, and the limits said to be provisional when they are;
//! * the horizontal axis in the plant's local time, the line labels in a margin of their
//!   own, moved apart so none covers another, and the value range taken from every line and
//!   point so nothing is cut off.

use plotters::coord::Shift;
use plotters::prelude::*;

use crate::format::{decimals_for, fixed};
use crate::stats::Limits;

/// The font the charts are labelled with (DejaVu Sans; its licence is beside it in assets/).
static FONT: &[u8] = include_bytes!("../assets/fonts/DejaVuSans.ttf");

fn font_ready() -> bool {
    static READY: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *READY.get_or_init(|| {
        plotters::style::register_font("sans-serif", FontStyle::Normal, FONT).is_ok()
    })
}

/// One plotted point.
#[derive(Debug, Clone, PartialEq)]
pub struct Point {
    /// Subgroup (or reading) number.
    pub number: u64,
    pub time_ms: i64,
    pub value: f64,
    /// The limits this point is judged against (they step where subgroup sizes differ).
    pub limits: Option<Limits>,
    /// One standard error of the plotted statistic here, for the 1σ/2σ lines.
    pub sigma: Option<f64>,
    /// Part of a signal: marked.
    pub marked: bool,
    /// Written beside the point: the rules that fired on it (on the point that completed the
    /// pattern; the other points of the pattern are only marked).
    pub label: Option<String>,
    /// Left out of the limits (drawn hollow).
    pub excluded: bool,
    /// Shown on hover in SVG: the subgroup, its time and value, and its parts.
    pub hover: Option<String>,
}

/// What the horizontal axis shows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Axis {
    /// The plant's local time of each subgroup (what the daemon formed).
    Time,
    /// Subgroup numbers (a study from a file, which has no times).
    Number,
}

/// One chart of the picture.
#[derive(Debug, Clone, PartialEq)]
pub struct Panel {
    /// What is plotted, in words: "subgroup mean (mm)".
    pub what: String,
    pub points: Vec<Point>,
    /// Draw the 1σ and 2σ lines (zone rules are on).
    pub zones: bool,
    /// Specification limits (only for single readings).
    pub lsl: Option<f64>,
    pub usl: Option<f64>,
    pub decimals: usize,
}

/// A whole picture: a title, a note (provisional limits), and one or two panels.
#[derive(Debug, Clone, PartialEq)]
pub struct Picture {
    pub title: String,
    /// A warning line under the title, such as provisional limits.
    pub note: Option<String>,
    pub panels: Vec<Panel>,
    pub tz: jiff::tz::TimeZone,
    pub axis: Axis,
    /// The readings' histogram under the charts, when asked for.
    pub histogram: Option<Histogram>,
}

/// A histogram of the readings against the specification limits, with the fitted model's
/// curve (expected counts per bin).
#[derive(Debug, Clone, PartialEq)]
pub struct Histogram {
    /// What the readings are, with the unit: "reading (mm)".
    pub what: String,
    /// Bin edges, from the lowest to the highest, and the count in each bin.
    pub edges: Vec<f64>,
    pub counts: Vec<usize>,
    pub lsl: Option<f64>,
    pub usl: Option<f64>,
    /// The fitted model's name and its expected count per bin width along the axis.
    pub curve: Option<(String, Vec<(f64, f64)>)>,
    pub decimals: usize,
}

impl Histogram {
    /// Bins the readings (√n bins, 5 to 40: common practice) over their range and the
    /// specification limits; `cdf` is the fitted model's distribution function, for the curve.
    pub fn new(
        readings: &[f64],
        what: &str,
        lsl: Option<f64>,
        usl: Option<f64>,
        model: Option<(&str, &dyn Fn(f64) -> f64)>,
    ) -> Option<Histogram> {
        let v: Vec<f64> = readings.iter().copied().filter(|x| x.is_finite()).collect();
        if v.len() < 2 {
            return None;
        }
        let lo = v.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if hi <= lo {
            return None;
        }
        let bins = ((v.len() as f64).sqrt().ceil() as usize).clamp(5, 40);
        let width = (hi - lo) / bins as f64;
        let edges: Vec<f64> = (0..=bins).map(|i| lo + width * i as f64).collect();
        let mut counts = vec![0usize; bins];
        for x in &v {
            let i = (((x - lo) / width) as usize).min(bins - 1);
            counts[i] += 1;
        }
        let n = v.len() as f64;
        let curve = model.map(|(name, cdf)| {
            // The curve spans the readings and the specification limits, and a little more.
            let a = lsl.map_or(lo, |l| l.min(lo)) - width;
            let b = usl.map_or(hi, |u| u.max(hi)) + width;
            let steps = 200;
            let pts = (0..=steps)
                .map(|i| {
                    let x = a + (b - a) * i as f64 / steps as f64;
                    let y = n * (cdf(x + width / 2.0) - cdf(x - width / 2.0));
                    (x, if y.is_finite() { y.max(0.0) } else { 0.0 })
                })
                .collect();
            (name.to_string(), pts)
        });
        Some(Histogram {
            what: what.to_string(),
            edges,
            counts,
            lsl,
            usl,
            curve,
            decimals: decimals_for(spread_of(v.iter().copied())),
        })
    }

    fn draw<DB: DrawingBackend>(
        &self,
        area: &DrawingArea<DB, Shift>,
        y_label_width: u32,
    ) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        let err = |e: DrawingAreaErrorKind<DB::ErrorType>| e.to_string();
        let first = self.edges[0];
        let last = self.edges[self.edges.len() - 1];
        let width = last - first;
        let mut x0 = first - width * 0.05;
        let mut x1 = last + width * 0.05;
        for l in [self.lsl, self.usl].into_iter().flatten() {
            x0 = x0.min(l - width * 0.05);
            x1 = x1.max(l + width * 0.05);
        }
        let top = self.counts.iter().copied().max().unwrap_or(1) as f64;
        let curve_top = self
            .curve
            .as_ref()
            .map_or(0.0, |c| c.1.iter().map(|p| p.1).fold(0.0, f64::max));
        let y1 = top.max(curve_top) * 1.15 + 0.5;
        let d = self.decimals;
        let mut chart = ChartBuilder::on(area)
            .margin_left(8)
            .margin_top(10)
            .margin_right(LABEL_MARGIN)
            .x_label_area_size(40)
            .y_label_area_size(y_label_width)
            .build_cartesian_2d(x0..x1, 0.0..y1)
            .map_err(err)?;
        let tick = |x: &f64| fixed(*x, d);
        chart
            .configure_mesh()
            .disable_x_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(RGBColor(235, 235, 235))
            .y_desc("readings")
            .x_desc(self.what.as_str())
            .x_labels(7)
            .y_labels(4)
            .x_label_formatter(&tick)
            .y_label_formatter(&|y: &f64| format!("{y:.0}"))
            .label_style(("sans-serif", 12).into_font().color(&INK))
            .axis_desc_style(("sans-serif", 12).into_font().color(&INK))
            .draw()
            .map_err(err)?;
        chart
            .draw_series(self.counts.iter().enumerate().map(|(i, &c)| {
                Rectangle::new(
                    [(self.edges[i], 0.0), (self.edges[i + 1], c as f64)],
                    RGBColor(150, 180, 225).filled(),
                )
            }))
            .map_err(err)?;
        chart
            .draw_series(self.counts.iter().enumerate().map(|(i, &c)| {
                Rectangle::new(
                    [(self.edges[i], 0.0), (self.edges[i + 1], c as f64)],
                    DATA.stroke_width(1),
                )
            }))
            .map_err(err)?;
        if let Some((_, pts)) = &self.curve {
            chart
                .draw_series(LineSeries::new(pts.iter().copied(), CENTRE.stroke_width(2)))
                .map_err(err)?;
        }
        for (name, v) in [("LSL", self.lsl), ("USL", self.usl)] {
            if let Some(v) = v {
                chart
                    .draw_series(LineSeries::new([(v, 0.0), (v, y1)], SPEC.stroke_width(2)))
                    .map_err(err)?;
                let (px, py) = chart.as_coord_spec().translate(&(v, y1 * 0.98));
                let (bx, by) = area.get_base_pixel();
                let text = format!("{name} {}", fixed(v, d));
                // The lower limit's label to the right of its line, the upper's to the left.
                let x = if name == "LSL" {
                    px - bx + 4
                } else {
                    px - bx - 4 - (6.5 * text.chars().count() as f64) as i32
                };
                area.draw(&Text::new(
                    text,
                    (x, py - by),
                    ("sans-serif", 11).into_font().color(&SPEC),
                ))
                .map_err(err)?;
            }
        }
        if let Some((name, _)) = &self.curve {
            let (w, _) = area.dim_in_pixel();
            area.draw(&Text::new(
                format!("curve: fitted {name}"),
                ((w - LABEL_MARGIN + 6) as i32, 40),
                ("sans-serif", 11).into_font().color(&CENTRE),
            ))
            .map_err(err)?;
        }
        Ok(())
    }
}

/// Colours (ours; the meaning is in the labels, never in the colour alone).
const INK: RGBColor = RGBColor(30, 30, 30);
const DATA: RGBColor = RGBColor(30, 80, 160);
const SIGNAL: RGBColor = RGBColor(200, 30, 30);
const CENTRE: RGBColor = RGBColor(20, 120, 60);
const LIMIT: RGBColor = RGBColor(180, 40, 40);
const ZONE: RGBColor = RGBColor(150, 150, 150);
const SPEC: RGBColor = RGBColor(120, 60, 170);
const NOTE: RGBColor = RGBColor(170, 90, 0);

/// Width of the margin on the right that holds the line labels, in pixels.
const LABEL_MARGIN: u32 = 118;
/// Gives each point's circle in the SVG a `<title>` (what a browser shows on hover), found by
/// its centre.
fn with_hovers(svg: String, hovers: &[(i32, i32, String)]) -> String {
    if hovers.is_empty() {
        return svg;
    }
    let at: std::collections::HashMap<(i32, i32), &str> = hovers
        .iter()
        .map(|(x, y, t)| ((*x, *y), t.as_str()))
        .collect();
    let esc = crate::format::html;
    let mut out = String::with_capacity(svg.len() + hovers.len() * 80);
    for line in svg.split_inclusive('\n') {
        let centre = line
            .trim_start()
            .strip_prefix("<circle cx=\"")
            .and_then(|rest| {
                let (x, rest) = rest.split_once('"')?;
                let y = rest.strip_prefix(" cy=\"")?.split('"').next()?;
                Some((x.parse::<i32>().ok()?, y.parse::<i32>().ok()?))
            });
        match centre.and_then(|c| at.get(&c)) {
            Some(text) if line.trim_end().ends_with("/>") => {
                let body = line.trim_end().trim_end_matches("/>");
                out.push_str(&format!("{body}><title>{}</title></circle>\n", esc(text)));
            }
            _ => out.push_str(line),
        }
    }
    out
}

/// A plotted value as hover text shows it: with enough decimals that it never prints equal to
/// the nearer control limit it is compared with.
fn value_words(value: f64, limits: Option<Limits>, decimals: usize) -> String {
    match limits {
        Some(l) => {
            let near = if (value - l.ucl).abs() < (value - l.lcl).abs() {
                l.ucl
            } else {
                l.lcl
            };
            crate::format::fixed_pair(value, near, decimals).0
        }
        None => fixed(value, decimals),
    }
}

/// What a point of the archive shows on hover: the subgroup, its local time, the value, its
/// parts and the rules that fired on it.
fn hover_of(
    s: &crate::archive::window::ArchivedSubgroup,
    chart: crate::rules::Chart,
    value: f64,
    decimals: usize,
    tz: &jiff::tz::TimeZone,
) -> String {
    let what = match chart {
        crate::rules::Chart::Dispersion => "spread",
        _ => "mean",
    };
    let d = if what == "spread" {
        decimals + 1
    } else {
        decimals
    };
    let limits = if what == "spread" {
        s.dispersion
    } else {
        s.location
    };
    let mut text = match (s.summary.found, s.summary.inspected) {
        // An attribute chart's subgroup: what was found in how many.
        (Some(found), Some(units)) => format!(
            "subgroup {}, {}: {} found in {} inspected, plotted {}",
            s.summary.number,
            crate::format::local_ms(s.summary.time_ms, tz),
            crate::format::num(found),
            crate::format::num(units),
            value_words(value, limits, d),
        ),
        _ => format!(
            "subgroup {}, {}: {what} {} (n = {})",
            s.summary.number,
            crate::format::local_ms(s.summary.time_ms, tz),
            value_words(value, limits, d),
            s.summary.n
        ),
    };
    let parts: Vec<&str> = s.parts.iter().flatten().map(String::as_str).collect();
    if !parts.is_empty() {
        text.push_str(&format!("; parts {}", parts.join(", ")));
    }
    let mut rules: Vec<&str> = s
        .violations
        .iter()
        .filter(|v| v.chart == chart)
        .map(|v| v.rule.as_str())
        .collect();
    rules.dedup();
    if !rules.is_empty() {
        text.push_str(&format!("; fired: {}", rules.join(", ")));
    }
    text
}

/// The location chart's statistic in words, with the unit part (" (mm)") after it.
/// What an attribute chart plots, for its panel.
fn attribute_words(a: crate::stats::attributes::AttributeChart) -> &'static str {
    use crate::stats::attributes::AttributeChart;
    match a {
        AttributeChart::P => "fraction nonconforming (p)",
        AttributeChart::Np => "number nonconforming (np)",
        AttributeChart::C => "defects per inspection (c)",
        AttributeChart::U => "defects per unit (u)",
    }
}

fn location_words(individuals: bool, unit: &str) -> String {
    let what = if individuals {
        "reading"
    } else {
        "subgroup mean"
    };
    format!("{what}{unit}")
}

/// The dispersion chart's statistic in words.
fn spread_words(kind: crate::stats::variables::DispersionKind) -> &'static str {
    use crate::stats::variables::DispersionKind;
    match kind {
        DispersionKind::Range => "subgroup range",
        DispersionKind::StdDev => "subgroup standard deviation",
        DispersionKind::MovingRange => "moving range",
    }
}

/// The location panel, and the dispersion panel of `spread` points under it when there are any
/// (the first individual has no moving range; a picture of one reading has none at all).
fn with_spread(location: Panel, what: String, spread: Vec<Point>) -> Vec<Panel> {
    let decimals = location.decimals + 1;
    let mut panels = vec![location];
    if !spread.is_empty() {
        panels.push(Panel {
            what,
            points: spread,
            zones: false,
            lsl: None,
            usl: None,
            decimals,
        });
    }
    panels
}

/// Rows of point labels above the data at most.
const MAX_LANES: usize = 4;
/// Smallest vertical distance between two line labels, in pixels.
const LABEL_GAP: i32 = 13;

impl Picture {
    /// The picture of a characteristic's recent subgroups, with the points of `alerts` marked.
    pub fn of_view(
        c: &crate::engine::CharView,
        alerts: &[&crate::alerts::Alert],
        tz: &jiff::tz::TimeZone,
    ) -> Result<Picture, String> {
        use crate::alerts::Level;
        use crate::rules::Chart;
        use crate::stats::variables::VariablesChart;
        if c.recent.is_empty() {
            return Err("no subgroups to draw yet".into());
        }
        let marked = |chart: Chart| -> std::collections::HashSet<u64> {
            alerts
                .iter()
                .filter(|a| a.level == Level::Subgroup && a.chart == chart)
                .flat_map(|a| a.points.iter().map(|p| p.number))
                .collect()
        };
        let (loc_marked, disp_marked) = (marked(Chart::Location), marked(Chart::Dispersion));
        let basis = c.basis.as_ref();
        let attribute = basis.and_then(|b| b.attribute());
        let individuals = basis.map(|b| b.chart)
            == Some(crate::limits_file::ChartKind::Variables(
                VariablesChart::Individuals,
            ))
            || (attribute.is_none() && c.recent.iter().all(|s| s.n == 1));
        let decimals = c
            .decimals
            .unwrap_or_else(|| decimals_for(spread_of(c.recent.iter().map(|s| s.mean))));
        let unit = if c.unit.is_empty() {
            String::new()
        } else {
            format!(" ({})", c.unit)
        };
        // An attribute chart's point has the limits of its own sample size.
        let at = |b: &crate::rules::point::ChartBasis,
                  s: &crate::archive::record::SubgroupSummary| {
            match (b.attribute(), s.inspected) {
                (Some(a), Some(size)) => b.attribute_at(a, size),
                _ => (b.sigma_point(s.n), b.location_for(s.n)),
            }
        };
        let location = Panel {
            what: match attribute {
                Some(a) => attribute_words(a).to_string(),
                None => location_words(individuals, &unit),
            },
            points: c
                .recent
                .iter()
                .map(|s| Point {
                    number: s.number,
                    time_ms: s.time_ms,
                    value: s.mean,
                    limits: basis.map(|b| at(b, s).1),
                    sigma: basis.map(|b| at(b, s).0),
                    marked: loc_marked.contains(&s.number),
                    label: None,
                    excluded: false,
                    hover: None,
                })
                .collect(),
            zones: c.zones && basis.is_some(),
            lsl: if individuals {
                c.spec.and_then(|s| s.lsl)
            } else {
                None
            },
            usl: if individuals {
                c.spec.and_then(|s| s.usl)
            } else {
                None
            },
            decimals,
        };
        let kind = basis.map_or(
            if individuals {
                "moving range"
            } else {
                "subgroup range"
            },
            |b| {
                b.chart
                    .variables()
                    .map_or("subgroup range", |v| spread_words(v.dispersion_kind()))
            },
        );
        let spread: Vec<Point> = c
            .recent
            .iter()
            .filter_map(|s| {
                s.dispersion.map(|d| Point {
                    number: s.number,
                    time_ms: s.time_ms,
                    value: d,
                    limits: basis.and_then(|b| b.dispersion_for(s.n)),
                    sigma: None,
                    marked: disp_marked.contains(&s.number),
                    label: None,
                    excluded: false,
                    hover: None,
                })
            })
            .collect();
        let panels = with_spread(location, format!("{kind}{unit}"), spread);
        let note = match &c.limits {
            crate::engine::LimitsState::Provisional { .. } => Some(
                "PROVISIONAL limits: learned by the daemon, not yet approved by an engineer"
                    .to_string(),
            ),
            crate::engine::LimitsState::Learning => {
                Some("no limits yet: the baseline is still being collected".to_string())
            }
            _ => None,
        };
        Ok(Picture {
            title: format!("{} ({})", c.name, c.id),
            note,
            panels,
            tz: tz.clone(),
            histogram: None,
            axis: Axis::Time,
        })
    }

    /// The picture of a baseline study from a file: its final limits (stepped where subgroup
    /// sizes differ), the subgroups outside them marked `beyond limits`, the excluded ones
    /// hollow; subgroup numbers on the axis.
    pub fn of_study(
        study: &crate::stats::study::Study,
        title: &str,
        unit: &str,
        zones: bool,
        spec: Option<(Option<f64>, Option<f64>)>,
    ) -> Picture {
        use crate::stats::variables::VariablesChart;
        let individuals = study.chart == VariablesChart::Individuals;
        let decimals = decimals_for(spread_of(study.points.iter().map(|p| p.stats.mean)));
        let unit = if unit.is_empty() {
            String::new()
        } else {
            format!(" ({unit})")
        };
        let beyond = |v: f64, l: &Limits| v > l.ucl || v < l.lcl;
        let location = Panel {
            what: location_words(individuals, &unit),
            points: study
                .points
                .iter()
                .map(|p| {
                    let out = beyond(p.stats.mean, &p.location);
                    Point {
                        number: p.subgroup as u64,
                        time_ms: 0,
                        value: p.stats.mean,
                        limits: Some(p.location),
                        sigma: Some((p.location.ucl - p.location.center) / 3.0),
                        marked: out,
                        label: out.then(|| "beyond limits".to_string()),
                        excluded: !p.included,
                        hover: Some(format!(
                            "subgroup {}: mean {}{}",
                            p.subgroup,
                            value_words(p.stats.mean, Some(p.location), decimals),
                            if p.included { "" } else { " (excluded)" }
                        )),
                    }
                })
                .collect(),
            zones,
            lsl: if individuals {
                spec.and_then(|s| s.0)
            } else {
                None
            },
            usl: if individuals {
                spec.and_then(|s| s.1)
            } else {
                None
            },
            decimals,
        };
        let kind = spread_words(study.dispersion_kind);
        let spread: Vec<Point> = study
            .points
            .iter()
            .filter_map(|p| {
                let d = p.stats.dispersion?;
                let out = beyond(d, &p.dispersion_limits);
                Some(Point {
                    number: p.subgroup as u64,
                    time_ms: 0,
                    value: d,
                    limits: Some(p.dispersion_limits),
                    sigma: None,
                    marked: out,
                    label: out.then(|| "beyond limits".to_string()),
                    excluded: !p.included,
                    hover: Some(format!(
                        "subgroup {}: {} {}{}",
                        p.subgroup,
                        kind,
                        value_words(d, Some(p.dispersion_limits), decimals + 1),
                        if p.included { "" } else { " (excluded)" }
                    )),
                })
            })
            .collect();
        let panels = with_spread(location, format!("{kind}{unit}"), spread);
        let excluded = study.excluded.len();
        let note = (excluded > 0).then(|| {
            format!(
                "{excluded} of {} subgroups excluded from the limits (drawn hollow)",
                study.subgroups_total
            )
        });
        Picture {
            title: title.to_string(),
            note,
            panels,
            tz: jiff::tz::TimeZone::UTC,
            histogram: None,
            axis: Axis::Number,
        }
    }

    /// The picture of an attribute study from a file: each sample's p, np, c or u against the
    /// limits of its own size (they step where sizes differ), samples beyond marked, excluded
    /// ones hollow; no dispersion chart.
    pub fn of_attribute_study(
        study: &crate::stats::attributes::AttributeStudy,
        samples: &[crate::stats::attributes::AttributeSample],
        title: &str,
        zones: bool,
    ) -> Picture {
        let chart = study.chart;
        let plotted: Vec<f64> = samples.iter().map(|s| chart.plotted(s)).collect();
        let decimals = decimals_for(spread_of(plotted.iter().copied()));
        let included = |i: usize| !study.excluded.iter().any(|e| e.subgroup == i + 1);
        let location = Panel {
            what: attribute_words(chart).to_string(),
            points: plotted
                .iter()
                .zip(&study.limits)
                .enumerate()
                .map(|(i, (&value, lim))| {
                    let out = lim.beyond(value);
                    let s = &samples[i];
                    Point {
                        number: i as u64 + 1,
                        time_ms: 0,
                        value,
                        limits: Some(*lim),
                        sigma: Some((lim.ucl - lim.center) / 3.0),
                        marked: out,
                        label: out.then(|| "beyond limits".to_string()),
                        excluded: !included(i),
                        hover: Some(format!(
                            "sample {}: {} found in {} inspected, {} {}{}",
                            i + 1,
                            crate::format::num(s.count),
                            crate::format::num(s.size),
                            chart.name(),
                            value_words(value, Some(*lim), decimals),
                            if included(i) { "" } else { " (excluded)" }
                        )),
                    }
                })
                .collect(),
            zones,
            lsl: None,
            usl: None,
            decimals,
        };
        let excluded = study.excluded.len();
        let note = (excluded > 0).then(|| {
            format!(
                "{excluded} of {} samples excluded from the limits (drawn hollow)",
                study.samples_total
            )
        });
        Picture {
            title: title.to_string(),
            note,
            panels: vec![location],
            tz: jiff::tz::TimeZone::UTC,
            histogram: None,
            axis: Axis::Number,
        }
    }

    /// The picture of a window of the archive: every subgroup against the limits recorded in
    /// force when it was judged (stepped where they changed), each violation's points marked
    /// and the subgroup that completed it labelled with the rule; local times on the axis.
    pub fn of_window(
        w: &crate::archive::window::CharacteristicWindow,
        title: &str,
        unit: &str,
        zones: bool,
        tz: &jiff::tz::TimeZone,
    ) -> Picture {
        use crate::rules::Chart;
        use std::collections::{HashMap, HashSet};
        let attribute = w.limits.as_ref().and_then(|l| l.chart.attribute());
        let individuals = attribute.is_none() && w.subgroups.iter().all(|s| s.summary.n == 1);
        let decimals = decimals_for(spread_of(w.subgroups.iter().map(|s| s.summary.mean)));
        let unit = if unit.is_empty() {
            String::new()
        } else {
            format!(" ({unit})")
        };
        let mut marked: HashMap<Chart, HashSet<u64>> = HashMap::new();
        let mut labels: HashMap<(Chart, u64), Vec<String>> = HashMap::new();
        // A rule is named where it starts to fire, not again on every subgroup while it goes
        // on firing (a shifted process fires the same rules on subgroup after subgroup): again
        // only after it has been quiet for QUIET subgroups.
        const QUIET: usize = 10;
        let mut last_fired: HashMap<(Chart, String), usize> = HashMap::new();
        for (i, s) in w.subgroups.iter().enumerate() {
            for v in &s.violations {
                marked
                    .entry(v.chart)
                    .or_default()
                    .extend(v.points.iter().map(|p| p.number));
                let key = (v.chart, v.rule.clone());
                let fresh = last_fired.get(&key).is_none_or(|&j| i - j > QUIET);
                let here = labels.entry((v.chart, s.summary.number)).or_default();
                if fresh && !here.contains(&v.rule) {
                    here.push(v.rule.clone());
                }
                last_fired.insert(key, i);
            }
        }
        labels.retain(|_, l| !l.is_empty());
        let point = |chart: Chart,
                     s: &crate::archive::window::ArchivedSubgroup,
                     value: f64,
                     limits: Option<Limits>| Point {
            number: s.summary.number,
            time_ms: s.summary.time_ms,
            value,
            limits,
            sigma: limits.map(|l| (l.ucl - l.center) / 3.0),
            marked: marked
                .get(&chart)
                .is_some_and(|m| m.contains(&s.summary.number)),
            label: labels.get(&(chart, s.summary.number)).map(|l| l.join(", ")),
            excluded: false,
            hover: Some(hover_of(s, chart, value, decimals, tz)),
        };
        let location = Panel {
            what: match attribute {
                Some(a) => attribute_words(a).to_string(),
                None => location_words(individuals, &unit),
            },
            points: w
                .subgroups
                .iter()
                .map(|s| point(Chart::Location, s, s.summary.mean, s.location))
                .collect(),
            zones,
            lsl: None,
            usl: None,
            decimals,
        };
        let kind = match w.limits.as_ref().and_then(|l| l.chart.variables()) {
            Some(c) => spread_words(c.dispersion_kind()),
            None if individuals => "moving range",
            None => "subgroup range",
        };
        let spread: Vec<Point> = w
            .subgroups
            .iter()
            .filter_map(|s| {
                Some(point(
                    Chart::Dispersion,
                    s,
                    s.summary.dispersion?,
                    s.dispersion,
                ))
            })
            .collect();
        let panels = with_spread(location, format!("{kind}{unit}"), spread);
        let note = match &w.limits {
            None => {
                Some("no limits in force in this window: the daemon was learning them".to_string())
            }
            Some(l) if l.provenance.provisional && l.approved.is_none() => Some(
                "PROVISIONAL limits: learned by the daemon, not yet approved by an engineer"
                    .to_string(),
            ),
            _ => None,
        };
        Picture {
            title: title.to_string(),
            note,
            panels,
            tz: tz.clone(),
            histogram: None,
            axis: Axis::Time,
        }
    }

    /// The picture as a PNG file's bytes.
    pub fn png(&self, width: u32, height: u32) -> Result<Vec<u8>, String> {
        if !font_ready() {
            return Err("the chart font did not load".into());
        }
        let mut rgb = vec![0u8; (width * height * 3) as usize];
        {
            let root = BitMapBackend::with_buffer(&mut rgb, (width, height)).into_drawing_area();
            self.draw(&root, &mut Vec::new())?;
            root.present().map_err(|e| e.to_string())?;
        }
        let mut out = Vec::new();
        {
            let mut enc = png::Encoder::new(&mut out, width, height);
            enc.set_color(png::ColorType::Rgb);
            enc.set_depth(png::BitDepth::Eight);
            let mut w = enc.write_header().map_err(|e| e.to_string())?;
            w.write_image_data(&rgb).map_err(|e| e.to_string())?;
        }
        Ok(out)
    }

    /// The picture as an SVG document.
    pub fn svg(&self, width: u32, height: u32) -> Result<String, String> {
        if !font_ready() {
            return Err("the chart font did not load".into());
        }
        let mut out = String::new();
        let mut hovers = Vec::new();
        {
            let root = SVGBackend::with_string(&mut out, (width, height)).into_drawing_area();
            self.draw(&root, &mut hovers)?;
            root.present().map_err(|e| e.to_string())?;
        }
        Ok(with_hovers(out, &hovers))
    }

    fn draw<DB: DrawingBackend>(
        &self,
        root: &DrawingArea<DB, Shift>,
        hovers: &mut Vec<(i32, i32, String)>,
    ) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        let err = |e: DrawingAreaErrorKind<DB::ErrorType>| e.to_string();
        root.fill(&WHITE).map_err(err)?;
        let (w, h) = root.dim_in_pixel();
        let head = if self.note.is_some() { 46 } else { 28 };
        let (title_area, body) = root.split_vertically(head);
        title_area
            .draw(&Text::new(
                self.title.clone(),
                (10, 6),
                ("sans-serif", 16).into_font().color(&INK),
            ))
            .map_err(err)?;
        if let Some(n) = &self.note {
            title_area
                .draw(&Text::new(
                    n.clone(),
                    (10, 26),
                    ("sans-serif", 13).into_font().color(&NOTE),
                ))
                .map_err(err)?;
        }
        let body_h = h.saturating_sub(head);
        let (body, hist_area, body_h) = match &self.histogram {
            Some(_) => {
                let (a, b) = body.split_vertically(body_h * 68 / 100);
                (a, Some(b), body_h * 68 / 100)
            }
            None => (body, None, body_h),
        };
        let areas: Vec<DrawingArea<DB, Shift>> = if self.panels.len() == 2 {
            let (a, b) = body.split_vertically(body_h * 58 / 100);
            vec![a, b]
        } else {
            vec![body]
        };
        let last = areas.len() - 1;
        // One width of tick labels for every panel, so the charts line up.
        let widest = self
            .panels
            .iter()
            .flat_map(|p| {
                p.points.iter().flat_map(move |pt| {
                    let l = pt
                        .limits
                        .map_or([pt.value; 3], |l| [l.ucl, l.lcl, pt.value]);
                    l.into_iter()
                        .map(move |v| fixed(v, p.decimals).chars().count() + 1)
                })
            })
            .max()
            .unwrap_or(6) as u32;
        for (i, (panel, area)) in self.panels.iter().zip(areas.iter()).enumerate() {
            self.draw_panel(panel, area, i == last, w, widest * 8 + 26, hovers)?;
        }
        if let (Some(hist), Some(area)) = (&self.histogram, hist_area) {
            hist.draw(&area, widest * 8 + 26)?;
        }
        Ok(())
    }

    fn draw_panel<DB: DrawingBackend>(
        &self,
        p: &Panel,
        area: &DrawingArea<DB, Shift>,
        time_axis: bool,
        width: u32,
        y_label_width: u32,
        hovers: &mut Vec<(i32, i32, String)>,
    ) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        let err = |e: DrawingAreaErrorKind<DB::ErrorType>| e.to_string();
        if p.points.is_empty() {
            return Ok(());
        }
        let d = p.decimals;
        let first = p.points[0].number as f64;
        let last = (p.points[p.points.len() - 1].number as f64).max(first + 1.0);
        let (x0, x1) = (first - 0.5, last + 0.5);
        // Every value drawn decides the range, so nothing is cut off.
        // Each line: its label, colour, points, and whether it is dashed.
        type Line = (String, RGBColor, Vec<(f64, f64)>, bool);
        let mut lines: Vec<Line> = Vec::new();
        let steps = |f: &dyn Fn(&Point) -> Option<f64>| -> Vec<(f64, f64)> {
            let mut v = Vec::new();
            for pt in &p.points {
                if let Some(y) = f(pt) {
                    let x = pt.number as f64;
                    v.push((x - 0.5, y));
                    v.push((x + 0.5, y));
                }
            }
            v
        };
        if p.points.iter().any(|pt| pt.limits.is_some()) {
            lines.push((
                "UCL".into(),
                LIMIT,
                steps(&|pt| pt.limits.map(|l| l.ucl)),
                false,
            ));
            lines.push((
                "CL".into(),
                CENTRE,
                steps(&|pt| pt.limits.map(|l| l.center)),
                false,
            ));
            lines.push((
                "LCL".into(),
                LIMIT,
                steps(&|pt| pt.limits.map(|l| l.lcl)),
                false,
            ));
            if p.zones {
                for k in [2.0, 1.0, -1.0, -2.0] {
                    let name = if k > 0.0 {
                        format!("+{k}σ")
                    } else {
                        format!("−{}σ", -k)
                    };
                    lines.push((
                        name,
                        ZONE,
                        steps(&|pt| match (pt.limits, pt.sigma) {
                            (Some(l), Some(s)) => Some(l.center + k * s),
                            _ => None,
                        }),
                        true,
                    ));
                }
            }
        }
        if let Some(u) = p.usl {
            lines.push(("USL".into(), SPEC, vec![(x0, u), (x1, u)], true));
        }
        if let Some(l) = p.lsl {
            lines.push(("LSL".into(), SPEC, vec![(x0, l), (x1, l)], true));
        }
        let mut lo = f64::INFINITY;
        let mut hi = f64::NEG_INFINITY;
        let all = p
            .points
            .iter()
            .map(|pt| pt.value)
            .chain(lines.iter().flat_map(|l| l.2.iter().map(|v| v.1)));
        for v in all.filter(|v| v.is_finite()) {
            lo = lo.min(v);
            hi = hi.max(v);
        }
        if !lo.is_finite() {
            return Ok(());
        }
        let pad = ((hi - lo) * 0.08).max(hi.abs().max(1.0) * 1e-9);
        let (lo, mut hi) = (lo - pad, hi + pad);
        // The point labels (rules that fired, exclusions) go in lanes above the data, in
        // headroom made for them, each starting over its point; one that would overlap another
        // takes the next lane.
        let plot_w = f64::from(
            width
                .saturating_sub(LABEL_MARGIN + y_label_width + 8)
                .max(50),
        );
        let (_, area_h0) = area.dim_in_pixel();
        let plot_h = f64::from(
            area_h0
                .saturating_sub(if time_axis { 44 } else { 22 } + 6)
                .max(40),
        );
        let mut notes: Vec<(i32, usize, String, bool)> = Vec::new();
        let mut lane_ends: Vec<i32> = Vec::new();
        for pt in &p.points {
            let text = match (&pt.label, pt.excluded) {
                (Some(l), true) => format!("{l} (excluded)"),
                (Some(l), false) => l.clone(),
                (None, true) => "excluded".to_string(),
                (None, false) => continue,
            };
            let tw = (6.5 * text.chars().count() as f64) as i32;
            let px = ((pt.number as f64 - x0) / (x1 - x0) * plot_w) as i32 - 3;
            let x = px.min(plot_w as i32 - tw).max(0);
            let lane = match lane_ends.iter().position(|&end| x > end + 8) {
                Some(k) => k,
                None if lane_ends.len() < MAX_LANES => {
                    lane_ends.push(i32::MIN);
                    lane_ends.len() - 1
                }
                // Every lane taken: the one that frees first (an overlap, not a lost label).
                None => (0..lane_ends.len())
                    .min_by_key(|&k| lane_ends[k])
                    .unwrap_or(0),
            };
            lane_ends[lane] = x + tw;
            notes.push((x, lane, text, pt.marked));
        }
        if !lane_ends.is_empty() {
            let head = (lane_ends.len() as f64) * 13.0 + 6.0;
            hi += (hi - lo) * head / (plot_h - head).max(10.0);
        }
        let tick = |y: &f64| fixed(*y, d);
        let times: std::collections::BTreeMap<u64, i64> =
            p.points.iter().map(|pt| (pt.number, pt.time_ms)).collect();
        let tz = self.tz.clone();
        let (t_first, t_last) = (p.points[0].time_ms, p.points[p.points.len() - 1].time_ms);
        // Seconds when the window is minutes long, the date when it is days long.
        let pattern = match (t_last - t_first).abs() {
            d if d < 10 * 60_000 => "%H:%M:%S",
            d if d < 2 * 86_400_000 => "%H:%M",
            _ => "%m-%d %H:%M",
        };
        let clock = move |x: &f64| -> String {
            let n = x.round() as u64;
            match times.get(&n) {
                Some(&ms) => match jiff::Timestamp::from_millisecond(ms) {
                    Ok(t) => t
                        .to_zoned_datetime(tz.clone())
                        .strftime(pattern)
                        .to_string(),
                    Err(_) => String::new(),
                },
                None => String::new(),
            }
        };
        let span = self.day_span(p);
        let mut chart = ChartBuilder::on(area)
            .margin_left(8)
            .margin_top(6)
            .margin_right(LABEL_MARGIN)
            .x_label_area_size(if time_axis { 44 } else { 22 })
            .y_label_area_size(y_label_width)
            .build_cartesian_2d(x0..x1, lo..hi)
            .map_err(err)?;
        let mut mesh = chart.configure_mesh();
        mesh.disable_x_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(RGBColor(235, 235, 235))
            .y_desc(p.what.as_str())
            .y_labels(6)
            .y_label_formatter(&tick)
            .x_labels(8)
            .label_style(("sans-serif", 12).into_font().color(&INK))
            .axis_desc_style(("sans-serif", 12).into_font().color(&INK));
        let numbers: std::collections::BTreeSet<u64> =
            p.points.iter().map(|pt| pt.number).collect();
        let number = move |x: &f64| -> String {
            let n = x.round();
            if (x - n).abs() < 1e-6 && n >= 0.0 && numbers.contains(&(n as u64)) {
                format!("{n}")
            } else {
                String::new()
            }
        };
        if time_axis && self.axis == Axis::Time {
            mesh.x_label_formatter(&clock).x_desc(span.as_str());
        } else if time_axis {
            mesh.x_label_formatter(&number).x_desc("subgroup");
        } else {
            mesh.x_label_formatter(&|_| String::new());
        }
        mesh.draw().map_err(err)?;
        for (_, color, pts, dashed) in &lines {
            if *dashed {
                for pair in pts.chunks(2) {
                    if let [a, b] = pair {
                        dash(&mut chart, *a, *b, *color, x1 - x0)?;
                    }
                }
            } else {
                chart
                    .draw_series(LineSeries::new(pts.iter().copied(), color.stroke_width(2)))
                    .map_err(err)?;
            }
        }
        chart
            .draw_series(LineSeries::new(
                p.points.iter().map(|pt| (pt.number as f64, pt.value)),
                DATA.stroke_width(1),
            ))
            .map_err(err)?;
        chart
            .draw_series(p.points.iter().map(|pt| {
                let at = (pt.number as f64, pt.value);
                match (pt.marked, pt.excluded) {
                    (true, false) => Circle::new(at, 5, SIGNAL.filled()),
                    (true, true) => Circle::new(at, 5, SIGNAL.stroke_width(2)),
                    (false, true) => Circle::new(at, 4, DATA.stroke_width(2)),
                    (false, false) => Circle::new(at, 3, DATA.filled()),
                }
            }))
            .map_err(err)?;
        for pt in &p.points {
            if let Some(h) = &pt.hover {
                let (x, y) = chart
                    .as_coord_spec()
                    .translate(&(pt.number as f64, pt.value));
                hovers.push((x, y, h.clone()));
            }
        }
        let (bx, _) = area.get_base_pixel();
        let plot_left = chart.as_coord_spec().translate(&(x0, hi)).0 - bx;
        for (x, lane, text, marked) in notes {
            let color = if marked { SIGNAL } else { DATA };
            area.draw(&Text::new(
                text,
                (plot_left + x, 8 + 13 * lane as i32),
                ("sans-serif", 11).into_font().color(&color),
            ))
            .map_err(err)?;
        }
        // Line labels in the right margin, at the height of each line's last value, moved
        // apart so none covers another.
        let coord = chart.as_coord_spec().clone();
        let (ax, ay) = area.get_base_pixel();
        let mut labels: Vec<(i32, String, RGBColor)> = lines
            .iter()
            .filter_map(|(name, color, pts, _)| {
                let (_, y) = *pts.last()?;
                let (_, py) = coord.translate(&(x1, y));
                Some((py - ay, format!("{name} {}", fixed(y, d)), *color))
            })
            .collect();
        labels.sort_by_key(|l| l.0);
        let (_, area_h) = area.dim_in_pixel();
        spread_apart(&mut labels, LABEL_GAP, 8, area_h as i32 - 8);
        let lx = (width - LABEL_MARGIN + 6) as i32 - ax;
        for (y, text, color) in labels {
            area.draw(&Text::new(
                text,
                (lx, y - 6),
                ("sans-serif", 11).into_font().color(&color),
            ))
            .map_err(err)?;
        }
        Ok(())
    }

    /// "local time, 2026-12-02 (Europe/Berlin)": the dates the panel spans, for the axis.
    fn day_span(&self, p: &Panel) -> String {
        let day = |ms: i64| {
            jiff::Timestamp::from_millisecond(ms)
                .map(|t| {
                    t.to_zoned_datetime(self.tz.clone())
                        .strftime("%Y-%m-%d")
                        .to_string()
                })
                .unwrap_or_default()
        };
        let (a, b) = (
            day(p.points[0].time_ms),
            day(p.points[p.points.len() - 1].time_ms),
        );
        let zone = self.tz.iana_name().unwrap_or("local");
        if a == b {
            format!("local time, {a} ({zone})")
        } else {
            format!("local time, {a} to {b} ({zone})")
        }
    }
}

fn dash<DB: DrawingBackend>(
    chart: &mut ChartContext<
        DB,
        Cartesian2d<plotters::coord::types::RangedCoordf64, plotters::coord::types::RangedCoordf64>,
    >,
    a: (f64, f64),
    b: (f64, f64),
    color: RGBColor,
    width: f64,
) -> Result<(), String>
where
    DB::ErrorType: 'static,
{
    let step = width / 90.0;
    let mut x = a.0;
    while x < b.0 {
        let end = (x + step * 0.55).min(b.0);
        let y = a.1 + (b.1 - a.1) * ((x - a.0) / (b.0 - a.0).max(f64::MIN_POSITIVE));
        chart
            .draw_series(LineSeries::new([(x, y), (end, y)], color.stroke_width(1)))
            .map_err(|e| e.to_string())?;
        x += step;
    }
    Ok(())
}

/// Moves sorted label heights apart to at least `gap`, keeping them within `top..=bottom`.
fn spread_apart(labels: &mut [(i32, String, RGBColor)], gap: i32, top: i32, bottom: i32) {
    for i in 0..labels.len() {
        let min = if i == 0 { top } else { labels[i - 1].0 + gap };
        labels[i].0 = labels[i].0.max(min);
    }
    let mut max = bottom;
    for l in labels.iter_mut().rev() {
        l.0 = l.0.min(max);
        max = l.0 - gap;
    }
}

fn spread_of(values: impl Iterator<Item = f64>) -> f64 {
    let v: Vec<f64> = values.filter(|v| v.is_finite()).collect();
    let lo = v.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if hi > lo { (hi - lo) / 6.0 } else { 1.0 }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn berlin() -> jiff::tz::TimeZone {
        jiff::tz::TimeZone::get("Europe/Berlin").expect("bundled tz data")
    }

    /// 2026-12-02T08:00:00Z, then one subgroup a minute.
    const T0: i64 = 1_796_198_400_000;

    fn panel(values: &[f64], limits: Limits, sigma: f64, zones: bool) -> Panel {
        Panel {
            what: "subgroup mean (mm)".into(),
            points: values
                .iter()
                .enumerate()
                .map(|(i, &v)| Point {
                    number: i as u64 + 1,
                    time_ms: T0 + 60_000 * i as i64,
                    value: v,
                    limits: Some(limits),
                    sigma: Some(sigma),
                    marked: v > limits.ucl,
                    label: None,
                    excluded: false,
                    hover: None,
                })
                .collect(),
            zones,
            lsl: None,
            usl: None,
            decimals: 4,
        }
    }

    fn lim(center: f64, half: f64) -> Limits {
        Limits {
            center,
            ucl: center + half,
            lcl: center - half,
        }
    }

    /// Every `<text>` element's anchor point, with its text.
    fn texts(svg: &str) -> Vec<(f64, f64, String)> {
        let mut out = Vec::new();
        for part in svg.split("<text").skip(1) {
            let attr = |name: &str| -> Option<f64> {
                let at = part.find(&format!(" {name}=\""))? + name.len() + 3;
                part[at..].split('"').next()?.parse().ok()
            };
            let body = part
                .split_once('>')
                .and_then(|(_, rest)| rest.split_once("</text>"))
                .map(|(t, _)| t.trim().to_string())
                .unwrap_or_default();
            if let (Some(x), Some(y)) = (attr("x"), attr("y")) {
                out.push((x, y, body));
            }
        }
        out
    }

    fn picture(panels: Vec<Panel>) -> Picture {
        Picture {
            title: "Port depth (vb210-port)".into(),
            note: Some("PROVISIONAL limits: learned by the daemon, not yet approved".into()),
            panels,
            tz: berlin(),
            histogram: None,
            axis: Axis::Time,
        }
    }

    #[test]
    fn nothing_is_cut_off_even_a_point_far_beyond_the_limits() {
        let mut values = vec![21.45; 30];
        values[17] = 21.90; // twenty standard errors out
        let pic = picture(vec![panel(&values, lim(21.45, 0.02), 0.02 / 3.0, true)]);
        let (w, h) = (860.0, 560.0);
        let svg = pic.svg(w as u32, h as u32).unwrap();
        for (x, y, t) in texts(&svg) {
            // Glyphs are at most about 8 px wide at these sizes.
            let right = x + 8.0 * t.chars().count() as f64;
            assert!(
                x >= 0.0 && y >= 0.0 && y <= h && right <= w + 1.0,
                "text {t:?} at ({x}, {y}) reaches {right}, outside {w}×{h}"
            );
        }
        // The far point is drawn inside the picture, and marked.
        let circles: Vec<(f64, f64)> = svg
            .split("<circle")
            .skip(1)
            .filter_map(|c| {
                let g = |n: &str| -> Option<f64> {
                    let at = c.find(&format!(" {n}=\""))? + n.len() + 3;
                    c[at..].split('"').next()?.parse().ok()
                };
                Some((g("cx")?, g("cy")?))
            })
            .collect();
        assert_eq!(circles.len(), 30);
        assert!(
            circles
                .iter()
                .all(|&(x, y)| (0.0..=w).contains(&x) && (0.0..=h).contains(&y))
        );
    }

    #[test]
    fn line_labels_do_not_cover_each_other_and_sit_beside_the_plot() {
        // Limits and zone lines crowded within a few pixels of each other.
        let values = vec![5.0, 5.001, 4.999, 5.0];
        let pic = picture(vec![panel(&values, lim(5.0, 0.0003), 0.0001, true)]);
        let svg = pic.svg(860, 560).unwrap();
        let mut ys: Vec<f64> = texts(&svg)
            .into_iter()
            .filter(|(_, _, t)| {
                ["UCL", "CL", "LCL", "+1σ", "+2σ", "−1σ", "−2σ"]
                    .iter()
                    .any(|k| t.starts_with(k))
            })
            .map(|(x, y, _)| {
                assert!(
                    x > 860.0 - LABEL_MARGIN as f64,
                    "a line label inside the plot at x {x}"
                );
                y
            })
            .collect();
        assert_eq!(ys.len(), 7, "UCL, CL, LCL and four zone lines are labelled");
        ys.sort_by(f64::total_cmp);
        for w in ys.windows(2) {
            assert!(
                w[1] - w[0] >= LABEL_GAP as f64 - 0.5,
                "labels {ys:?} overlap"
            );
        }
    }

    #[test]
    fn zone_lines_only_when_zone_rules_are_on() {
        let values = vec![1.0, 1.1, 0.9];
        let with = picture(vec![panel(&values, lim(1.0, 0.3), 0.1, true)]);
        let without = picture(vec![panel(&values, lim(1.0, 0.3), 0.1, false)]);
        assert!(with.svg(860, 560).unwrap().contains("+1σ"));
        assert!(!without.svg(860, 560).unwrap().contains("+1σ"));
    }

    #[test]
    fn the_time_axis_is_in_the_plants_local_time() {
        let values = vec![1.0; 10];
        let svg = picture(vec![panel(&values, lim(1.0, 0.3), 0.1, false)])
            .svg(860, 560)
            .unwrap();
        // 08:00 UTC is 09:00 in Berlin in December.
        assert!(
            texts(&svg).iter().any(|(_, _, t)| t.starts_with("09:0")),
            "no local clock time on the axis"
        );
        assert!(svg.contains("2026-12-02 (Europe/Berlin)"));
        assert!(svg.contains("PROVISIONAL"));
    }

    #[test]
    fn spec_limits_appear_only_where_single_readings_are_plotted() {
        use crate::engine::{CharView, LimitsState};
        use crate::rules::point::ChartBasis;
        use crate::stats::variables::VariablesChart;
        let recent = |n: usize| -> Vec<crate::archive::record::SubgroupSummary> {
            (1..=12)
                .map(|i| crate::archive::record::SubgroupSummary {
                    number: i,
                    time_ms: T0 + i as i64 * 60_000,
                    n,
                    mean: 12.0 + 0.001 * (i % 3) as f64,
                    dispersion: Some(0.004),
                    found: None,
                    inspected: None,
                })
                .collect()
        };
        let view = |chart: VariablesChart, n: usize| {
            let sigma = 0.002;
            let kind = chart.dispersion_kind();
            let basis = ChartBasis {
                chart: chart.into(),
                below_severity: None,
                center: 12.001,
                sigma,
                nominal_n: n,
                location: crate::stats::variables::location_limits(12.001, sigma, n),
                dispersion: crate::stats::variables::dispersion_limits(kind, sigma, n.max(2))
                    .unwrap(),
                unit: "mm".into(),
                decimals: Some(4),
            };
            CharView {
                id: "bore".into(),
                name: "Bore".into(),
                unit: "mm".into(),
                learning: false,
                baseline: None,
                limits: LimitsState::Learning,
                standing: crate::alerts::Standing::InControl,
                recent: recent(n),
                location: Some(basis.location),
                spec: Some(crate::stats::capability::Spec {
                    lsl: Some(11.99),
                    usl: Some(12.01),
                    target: None,
                }),
                readings: 60,
                decimals: Some(4),
                basis: Some(basis),
                zones: false,
            }
        };
        let tz = berlin();
        let means = Picture::of_view(&view(VariablesChart::XbarR, 5), &[], &tz).unwrap();
        let singles = Picture::of_view(&view(VariablesChart::Individuals, 1), &[], &tz).unwrap();
        assert_eq!(means.panels.len(), 2, "the location and the spread chart");
        assert!(
            means
                .panels
                .iter()
                .all(|p| p.usl.is_none() && p.lsl.is_none())
        );
        assert_eq!(singles.panels[0].usl, Some(12.01));
        assert_eq!(singles.panels[1].usl, None, "no spec on the moving range");
        let svg = means.svg(860, 560).unwrap();
        assert!(!svg.contains("USL") && svg.contains("subgroup range (mm)"));
        assert!(singles.svg(860, 560).unwrap().contains("USL 12.0100"));
        // The PNG is drawn too (the email's picture).
        let png = means.png(860, 560).unwrap();
        assert_eq!(&png[1..4], b"PNG");
        // To look at them: LINEWARDEN_CHART_SAMPLES=/tmp cargo test --lib chart::
        if let Ok(dir) = std::env::var("LINEWARDEN_CHART_SAMPLES") {
            let dir = std::path::Path::new(&dir);
            std::fs::write(dir.join("means.png"), &png).unwrap();
            std::fs::write(dir.join("singles.png"), singles.png(860, 560).unwrap()).unwrap();
        }
    }
}
