//! The page's charts as inline SVG strings: the board (intervals on one
//! axis), the history lines with their bands, the propensities of both
//! arms against the overlap thresholds, and the events on a timeline.
//!
//! Every function here is pure: records in, markup out, each name escaped.
//! Drawn elements carry `data-kind` (and `data-model`, `data-arm`,
//! `data-event` ...) so that tests can count them in the browser's DOM.

use std::collections::BTreeMap;
use std::fmt::Write;

use super::scale::{self, Linear};
use super::{ArmPropensity, Esc, ModelHistory, Propensities, Thresholds, BOARD_ROWS};
use crate::domain::{Board, EventRecord};

/// Writes formatted text into a String (which cannot fail).
macro_rules! put {
    ($($t:tt)*) => {{ let _ = write!($($t)*); }};
}

/// Colour-blind-safe model colours (after Okabe & Ito, and Tol).
const PALETTE: [&str; 10] = [
    "#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#882255", "#44AA99",
    "#999933", "#332288",
];
const BASELINE: &str = "#8a8a8a";
const INK: &str = "#222";
const GRID: &str = "#e3e3e3";
const ZERO: &str = "#444";
const TREATED: &str = "#B5533C";
const CONTROL: &str = "#3A6EA5";
const THRESHOLD: &str = "#C0392B";
/// Arms' colours on the generalized-propensity chart, the reference
/// first: the binary chart's control and treated colours, then muted
/// tones apart from the models' palette.
const ARM_COLORS: [&str; 6] = [CONTROL, TREATED, "#6B5B95", "#5B8C5A", "#8C6D31", "#7A7A7A"];

/// The shortest time axis (a history of recomputes seconds apart still
/// gets readable ticks).
const MIN_TIME_SPAN_MS: i64 = 1_000;

/// z for a two-sided 95% band.
const Z95: f64 = 1.959_963_984_540_054;

/// Each model's colour, the same on every chart: registered models in
/// name order take the palette in turn, baselines are grey.
#[derive(Debug, Clone, Default)]
pub struct Colors(BTreeMap<String, &'static str>);

impl Colors {
    /// On a dataset with arms, the models of every contrast's board: a
    /// model keeps its colour from one contrast to the next.
    pub fn of(board: &Board) -> Self {
        let mut names: Vec<&str> = std::iter::once(board)
            .chain(&board.contrasts)
            .flat_map(|b| &b.models)
            .filter(|m| !m.baseline)
            .map(|m| m.name.as_str())
            .collect();
        names.sort_unstable();
        names.dedup();
        Colors(
            names
                .into_iter()
                .enumerate()
                .map(|(i, n)| (n.to_string(), PALETTE[i % PALETTE.len()]))
                .collect(),
        )
    }

    pub fn get(&self, model: &str) -> &'static str {
        self.0.get(model).copied().unwrap_or(BASELINE)
    }
}

/// A name cut to `max` characters, with an ellipsis when cut.
pub fn short(name: &str, max: usize) -> String {
    if name.chars().count() <= max {
        return name.to_string();
    }
    let mut s: String = name.chars().take(max.saturating_sub(1)).collect();
    s.push('…');
    s
}

fn open(out: &mut String, kind: &str, width: f64, height: f64, label: &str) {
    put!(
        out,
        r#"<svg xmlns="http://www.w3.org/2000/svg" data-kind="{kind}" viewBox="0 0 {width} {height}" width="100%" role="img" aria-label="{}">"#,
        Esc(label)
    );
}

/// Vertical grid lines at about `n` round times between `t0` and `t1`,
/// labelled under `bottom`: the time axis of the history and the timeline.
fn time_grid(out: &mut String, x: &Linear, (t0, t1): (i64, i64), n: usize, top: f64, bottom: f64) {
    for (t, label) in scale::time_ticks(t0, t1, n) {
        let px = x.at(t as f64);
        put!(
            out,
            r#"<line x1="{px:.1}" y1="{top}" x2="{px:.1}" y2="{bottom}" stroke="{GRID}"/><text class="tick" x="{px:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
            bottom + 18.0,
            Esc(&label)
        );
    }
}

fn note(message: &str) -> String {
    format!(
        r#"<p class="note" data-kind="no-data">{}</p>"#,
        Esc(message)
    )
}

/// Vertical grid lines and labels of a value axis along x.
fn x_axis(out: &mut String, x: &Linear, ticks: &scale::Ticks, top: f64, bottom: f64) {
    for &v in &ticks.values {
        let px = x.at(v);
        put!(
            out,
            r#"<line x1="{px:.1}" y1="{top:.1}" x2="{px:.1}" y2="{bottom:.1}" stroke="{GRID}"/>"#
        );
        put!(
            out,
            r#"<text class="tick" x="{px:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
            bottom + 16.0,
            scale::tick_label(v, ticks.step)
        );
    }
    put!(
        out,
        r#"<line x1="{:.1}" y1="{bottom:.1}" x2="{:.1}" y2="{bottom:.1}" stroke="{INK}"/>"#,
        x.r0,
        x.r1
    );
}

/// The board: one row per ranked model (by rank, at most [`BOARD_ROWS`]),
/// its corrected PEHE minus constant-effect's as an estimate with its 95%
/// interval and, where the board has it, the joint interval, all on one
/// axis with zero marked; the front-runner's row also shows its interval
/// allowing for its selection. Columns beside give the numbers and each
/// model's chance of the lowest error.
pub fn board_chart(board: &Board, colors: &Colors) -> String {
    if !board.degenerate.is_empty() {
        return note(&format!("No scores in this window: {}", board.degenerate));
    }
    if board.models.is_empty() {
        return note("No ranked models on this board yet.");
    }
    let mut rows: Vec<_> = board.models.iter().collect();
    rows.sort_by_key(|m| m.rank);
    let hidden = rows.len().saturating_sub(BOARD_ROWS);
    rows.truncate(BOARD_ROWS);
    let adjusted = board
        .front_runner_vs_constant
        .filter(|a| a.ci_low.is_finite() && a.ci_high.is_finite());

    // The axis covers zero and the registered models' marks; a baseline
    // far outside (zero-effect often is) is cut at the edge and says so,
    // rather than squeezing every model into a corner.
    let spans_of = |baselines: bool| {
        let (mut lo, mut hi) = (0.0f64, 0.0f64);
        let mut take = |v: f64| {
            if v.is_finite() {
                lo = lo.min(v);
                hi = hi.max(v);
            }
        };
        for m in rows.iter().filter(|m| baselines || !m.baseline) {
            let d = &m.vs_constant;
            for v in [d.estimate, d.ci_low, d.ci_high] {
                take(v);
            }
            if let Some((a, b)) = d.joint {
                take(a);
                take(b);
            }
        }
        if let Some(a) = adjusted {
            take(a.ci_low);
            take(a.ci_high);
        }
        (lo, hi)
    };
    let (lo, hi) = spans_of(rows.iter().all(|m| m.baseline));
    let ticks = scale::ticks(lo, hi, 6);

    const WIDTH: f64 = 1260.0;
    const TOP: f64 = 58.0;
    const ROW: f64 = 30.0;
    let (plot0, plot1) = (290.0, 740.0);
    let x = Linear::new((ticks.lo, ticks.hi), (plot0, plot1));
    let clip = |v: f64| x.at(v.clamp(ticks.lo, ticks.hi));
    let outside = |v: f64| v < ticks.lo || v > ticks.hi;
    let bottom = TOP + ROW * rows.len() as f64 + 4.0;
    let height = bottom + 96.0;
    let mut out = String::new();
    open(
        &mut out,
        "board-chart",
        WIDTH,
        height,
        "each ranked model's error difference from constant-effect with its 95% interval",
    );
    // Column titles.
    put!(
        out,
        r#"<text class="head" x="16" y="18">model (by rank)</text><text class="head" x="{:.1}" y="18" text-anchor="middle">difference from constant-effect (lower is better)</text><text class="head" x="830" y="18" text-anchor="end">difference</text><text class="head" x="845" y="18">95% interval</text><text class="head" x="1015" y="18">chance lowest</text><text class="head" x="1150" y="18">status</text>"#,
        (plot0 + plot1) / 2.0
    );
    // Row shading, then the grid under the marks.
    for i in (0..rows.len()).step_by(2) {
        put!(
            out,
            r##"<rect x="8" y="{:.1}" width="{:.1}" height="{ROW}" fill="#f6f7f9"/>"##,
            TOP + ROW * i as f64,
            WIDTH - 16.0
        );
    }
    x_axis(&mut out, &x, &ticks, TOP - 6.0, bottom);
    let zero = x.at(0.0);
    put!(
        out,
        r#"<line data-kind="zero-line" x1="{zero:.1}" y1="{:.1}" x2="{zero:.1}" y2="{bottom:.1}" stroke="{ZERO}" stroke-width="1.5" stroke-dasharray="5 3"/>"#,
        TOP - 10.0
    );
    put!(
        out,
        r#"<text class="small" x="{zero:.1}" y="{:.1}" text-anchor="middle">0 = constant-effect</text>"#,
        TOP - 14.0
    );

    let mut any_cut = false;
    for (i, m) in rows.iter().enumerate() {
        let d = &m.vs_constant;
        let y = TOP + ROW * i as f64 + ROW / 2.0;
        let color = colors.get(&m.name);
        let front = !board.front_runner.is_empty() && m.name == board.front_runner;
        let status = if front {
            "front-runner"
        } else if m.in_best_set {
            "not separated"
        } else {
            ""
        };
        put!(
            out,
            r#"<g data-kind="board-row" data-model="{}" data-rank="{}"{}>"#,
            Esc(&m.name),
            m.rank,
            if front {
                r#" data-front-runner="true""#
            } else {
                ""
            }
        );
        put!(
            out,
            "<title>{}: {} (95% interval {} to {}){}</title>",
            Esc(&m.name),
            scale::signed(d.estimate),
            scale::signed(d.ci_low),
            scale::signed(d.ci_high),
            match d.joint {
                Some((a, b)) => format!(
                    "; joint interval {} to {}",
                    scale::signed(a),
                    scale::signed(b)
                ),
                None => String::new(),
            }
        );
        // Name with its colour.
        put!(
            out,
            r#"<rect x="16" y="{:.1}" width="10" height="10" rx="2" fill="{color}"/>"#,
            y - 5.0
        );
        put!(
            out,
            r#"<text class="{}" x="32" y="{:.1}">{}. {}{}</text>"#,
            if front { "name front" } else { "name" },
            y + 4.5,
            m.rank,
            Esc(&short(&m.name, 28)),
            if m.baseline {
                r#" <tspan class="muted">(baseline)</tspan>"#
            } else {
                ""
            }
        );
        if let Some((a, b)) = d.joint.filter(|(a, b)| a.is_finite() && b.is_finite()) {
            let (xa, xb) = (clip(a), clip(b));
            put!(
                out,
                r#"<path data-kind="joint-interval" data-model="{}" d="M{xa:.1} {:.1}V{:.1}M{xa:.1} {y:.1}H{xb:.1}M{xb:.1} {:.1}V{:.1}" stroke="{color}" stroke-opacity="0.55" stroke-width="1.5" fill="none"/>"#,
                Esc(&m.name),
                y - 6.0,
                y + 6.0,
                y - 6.0,
                y + 6.0
            );
        }
        let cut = [d.estimate, d.ci_low, d.ci_high].into_iter().any(outside);
        if d.ci_low.is_finite() && d.ci_high.is_finite() {
            let (xa, xb) = (clip(d.ci_low), clip(d.ci_high));
            put!(
                out,
                r#"<rect data-kind="interval" data-model="{}" data-low="{}" data-high="{}"{} x="{:.1}" y="{:.1}" width="{:.1}" height="8" rx="3" fill="{color}"/>"#,
                Esc(&m.name),
                d.ci_low,
                d.ci_high,
                if cut { r#" data-cut="true""# } else { "" },
                xa.min(xb),
                y - 4.0,
                (xb - xa).abs().max(1.5)
            );
        }
        if d.estimate.is_finite() && !outside(d.estimate) {
            put!(
                out,
                r##"<circle data-kind="estimate" data-model="{}" cx="{:.1}" cy="{y:.1}" r="5" fill="#fff" stroke="{INK}" stroke-width="2"/>"##,
                Esc(&m.name),
                x.at(d.estimate)
            );
        }
        if cut {
            // An arrow at the edge the row runs off.
            let (edge, dir) = if d.estimate > ticks.hi || d.ci_high > ticks.hi {
                (plot1, 1.0)
            } else {
                (plot0, -1.0)
            };
            any_cut = true;
            put!(
                out,
                r#"<path data-kind="cut-mark" d="M{:.1} {:.1}L{:.1} {y:.1}L{:.1} {:.1}Z" fill="{INK}"/>"#,
                edge + 2.0 * dir,
                y - 7.0,
                edge + 12.0 * dir,
                edge + 2.0 * dir,
                y + 7.0
            );
        }
        if let (true, Some(a)) = (front, adjusted) {
            put!(
                out,
                r#"<line data-kind="adjusted-interval" data-model="{}" x1="{:.1}" y1="{:.1}" x2="{:.1}" y2="{:.1}" stroke="{INK}" stroke-width="1.5" stroke-dasharray="4 3"/>"#,
                Esc(&m.name),
                clip(a.ci_low),
                y + 10.0,
                clip(a.ci_high),
                y + 10.0
            );
        }
        // The numbers.
        put!(
            out,
            r#"<text class="num" x="830" y="{:.1}" text-anchor="end">{}</text><text class="num" x="845" y="{:.1}">[{}, {}]</text>"#,
            y + 4.5,
            scale::signed(d.estimate),
            y + 4.5,
            scale::signed(d.ci_low),
            scale::signed(d.ci_high)
        );
        match m.chance_lowest {
            Some(c) if c.is_finite() => {
                put!(
                    out,
                    r##"<rect x="1015" y="{:.1}" width="60" height="10" fill="#eceef1"/><rect data-kind="chance" data-model="{}" data-value="{c}" x="1015" y="{:.1}" width="{:.1}" height="10" fill="{color}"/><text class="num" x="1081" y="{:.1}">{}</text>"##,
                    y - 5.0,
                    Esc(&m.name),
                    y - 5.0,
                    60.0 * c.clamp(0.0, 1.0),
                    y + 4.5,
                    scale::percent(c)
                );
            }
            _ => put!(
                out,
                r#"<text class="num muted" x="1015" y="{:.1}">n/a</text>"#,
                y + 4.5
            ),
        }
        put!(
            out,
            r#"<text class="{}" x="1150" y="{:.1}">{status}</text></g>"#,
            if front { "status front" } else { "status" },
            y + 4.5
        );
    }
    put!(
        out,
        r#"<text class="axis" x="{:.1}" y="{:.1}" text-anchor="middle">corrected PEHE of the model minus that of constant-effect</text>"#,
        (plot0 + plot1) / 2.0,
        bottom + 36.0
    );
    // Legend of the marks.
    let ly = bottom + 66.0;
    put!(
        out,
        r##"<g class="legend"><circle cx="22" cy="{ly:.1}" r="5" fill="#fff" stroke="{INK}" stroke-width="2"/><text x="34" y="{:.1}">estimate</text><rect x="110" y="{:.1}" width="34" height="8" rx="3" fill="{}"/><text x="152" y="{:.1}">95% interval</text><path d="M250 {:.1}V{:.1}M250 {ly:.1}H290M290 {:.1}V{:.1}" stroke="{}" stroke-opacity="0.55" stroke-width="1.5" fill="none"/><text x="298" y="{:.1}">joint 95% interval (holds for every row at once)</text><line x1="620" y1="{ly:.1}" x2="660" y2="{ly:.1}" stroke="{INK}" stroke-width="1.5" stroke-dasharray="4 3"/><text x="668" y="{:.1}">front-runner's interval allowing for its selection</text>"##,
        ly + 4.5,
        ly - 4.0,
        PALETTE[0],
        ly + 4.5,
        ly - 6.0,
        ly + 6.0,
        ly - 6.0,
        ly + 6.0,
        PALETTE[0],
        ly + 4.5,
        ly + 4.5
    );
    if any_cut {
        put!(
            out,
            r#"<path d="M1030 {:.1}L1040 {ly:.1}L1030 {:.1}Z" fill="{INK}"/><text x="1048" y="{:.1}">runs beyond the axis</text>"#,
            ly - 6.0,
            ly + 6.0,
            ly + 4.5
        );
    }
    out.push_str("</g></svg>");
    if hidden > 0 {
        out.push_str(&note(&format!(
            "{hidden} lower-ranked models are not drawn (the board chart shows the first {BOARD_ROWS})."
        )));
    }
    out
}

/// The history of each model's difference from constant-effect: one line
/// per model with its 95% band (estimate +- 1.96 se) shaded, over the time
/// of each recompute, zero marked, and a legend naming each line.
pub fn history_chart(lines: &[ModelHistory], colors: &Colors) -> String {
    let points = || lines.iter().flat_map(|l| l.points.iter());
    if points().next().is_none() {
        return note("No history yet: each recompute adds a point.");
    }
    let (mut t0, mut t1) = (i64::MAX, i64::MIN);
    let (mut lo, mut hi) = (0.0f64, 0.0f64);
    for p in points() {
        t0 = t0.min(p.computed_at_ms);
        t1 = t1.max(p.computed_at_ms);
        for v in [p.estimate, p.estimate - Z95 * p.se, p.estimate + Z95 * p.se] {
            if v.is_finite() {
                lo = lo.min(v);
                hi = hi.max(v);
            }
        }
    }
    let (t0, t1) = scale::time_domain(t0, t1, MIN_TIME_SPAN_MS);
    let ticks = scale::ticks(lo, hi, 6);

    const WIDTH: f64 = 1260.0;
    const HEIGHT: f64 = 350.0;
    let (left, right, top, bottom) = (84.0, 990.0, 16.0, 284.0);
    let x = Linear::new((t0 as f64, t1 as f64), (left, right));
    let y = Linear::new((ticks.lo, ticks.hi), (bottom, top));
    let mut out = String::new();
    open(
        &mut out,
        "history-chart",
        WIDTH,
        HEIGHT,
        "each model's difference from constant-effect over time, with 95% bands",
    );
    for &v in &ticks.values {
        let py = y.at(v);
        put!(
            out,
            r#"<line x1="{left}" y1="{py:.1}" x2="{right}" y2="{py:.1}" stroke="{GRID}"/><text class="tick" x="{:.1}" y="{:.1}" text-anchor="end">{}</text>"#,
            left - 8.0,
            py + 4.0,
            scale::tick_label(v, ticks.step)
        );
    }
    time_grid(&mut out, &x, (t0, t1), 7, top, bottom);
    put!(
        out,
        r#"<line x1="{left}" y1="{bottom}" x2="{right}" y2="{bottom}" stroke="{INK}"/><line x1="{left}" y1="{top}" x2="{left}" y2="{bottom}" stroke="{INK}"/>"#
    );
    let zero = y.at(0.0);
    put!(
        out,
        r#"<line data-kind="zero-line" x1="{left}" y1="{zero:.1}" x2="{right}" y2="{zero:.1}" stroke="{ZERO}" stroke-width="1.5" stroke-dasharray="5 3"/><text class="small" x="{:.1}" y="{:.1}" text-anchor="end">0 = constant-effect</text>"#,
        right - 4.0,
        zero - 5.0
    );
    // Bands first, so that every line is drawn over every band.
    for l in lines.iter().filter(|l| !l.points.is_empty()) {
        let color = colors.get(&l.model);
        let mut d = String::new();
        for (i, p) in l.points.iter().enumerate() {
            put!(
                d,
                "{}{:.1} {:.1}",
                if i == 0 { "M" } else { "L" },
                x.at(p.computed_at_ms as f64),
                y.at(p.estimate + Z95 * p.se)
            );
        }
        for p in l.points.iter().rev() {
            put!(
                d,
                "L{:.1} {:.1}",
                x.at(p.computed_at_ms as f64),
                y.at(p.estimate - Z95 * p.se)
            );
        }
        put!(
            out,
            r#"<path data-kind="history-band" data-model="{}" d="{d}Z" fill="{color}" fill-opacity="0.13" stroke="{color}" stroke-opacity="0.25" stroke-width="0.8"/>"#,
            Esc(&l.model)
        );
    }
    for l in lines.iter().filter(|l| !l.points.is_empty()) {
        let color = colors.get(&l.model);
        let mut d = String::new();
        for (i, p) in l.points.iter().enumerate() {
            put!(
                d,
                "{}{:.1} {:.1}",
                if i == 0 { "M" } else { "L" },
                x.at(p.computed_at_ms as f64),
                y.at(p.estimate)
            );
        }
        put!(
            out,
            r#"<path data-kind="history-line" data-model="{}" data-points="{}" d="{d}" fill="none" stroke="{color}" stroke-width="2.2" stroke-linejoin="round"/>"#,
            Esc(&l.model),
            l.points.len()
        );
        if l.points.len() <= 60 {
            for p in &l.points {
                put!(
                    out,
                    r#"<circle cx="{:.1}" cy="{:.1}" r="3.2" fill="{color}"><title>{}: {} (se {}) at {}</title></circle>"#,
                    x.at(p.computed_at_ms as f64),
                    y.at(p.estimate),
                    Esc(&l.model),
                    scale::signed(p.estimate),
                    scale::sig(p.se),
                    scale::datetime(p.computed_at_ms)
                );
            }
        }
    }
    put!(
        out,
        r#"<text class="axis" x="{:.1}" y="{:.1}" text-anchor="middle">time of the recompute (UTC)</text><text class="axis" transform="translate(22 {:.1}) rotate(-90)" text-anchor="middle">difference from constant-effect</text>"#,
        (left + right) / 2.0,
        bottom + 46.0,
        (top + bottom) / 2.0
    );
    // Legend: colour, name and latest value of each line.
    put!(
        out,
        r#"<text class="head" x="1010" y="{:.1}">latest (95% band)</text>"#,
        top + 10.0
    );
    for (i, l) in lines.iter().filter(|l| !l.points.is_empty()).enumerate() {
        let ly = top + 36.0 + 40.0 * i as f64;
        let color = colors.get(&l.model);
        let last = l.points.last().map(|p| (p.estimate, p.se));
        put!(
            out,
            r#"<g data-kind="legend-item" data-model="{}"><line x1="1010" y1="{ly:.1}" x2="1036" y2="{ly:.1}" stroke="{color}" stroke-width="3"/><text class="name" x="1044" y="{:.1}">{}</text>"#,
            Esc(&l.model),
            ly + 4.5,
            Esc(&short(&l.model, 24))
        );
        if let Some((e, se)) = last {
            put!(
                out,
                r#"<text class="num muted" x="1044" y="{:.1}">{} ± {}</text>"#,
                ly + 21.0,
                scale::signed(e),
                scale::sig(Z95 * se)
            );
        }
        out.push_str("</g>");
    }
    out.push_str("</svg>");
    out
}

/// Both arms' propensities as back-to-back histograms (treated above the
/// axis, control below, each bin as a share of its arm), the extreme
/// regions outside [eps, 1 - eps] shaded and bounded by threshold lines.
pub fn propensity_chart(p: &Propensities, t: &Thresholds) -> String {
    let bins = p.treated.len().min(p.control.len());
    if bins == 0 {
        return note("No propensities on this board.");
    }
    let total = |v: &[u64]| v.iter().sum::<u64>().max(1) as f64;
    let (nt, nc) = (total(&p.treated), total(&p.control));
    let max_share = p
        .treated
        .iter()
        .map(|&c| c as f64 / nt)
        .chain(p.control.iter().map(|&c| c as f64 / nc))
        .fold(0.0f64, f64::max)
        .max(0.01);
    let ticks = scale::ticks(0.0, max_share, 4);

    const WIDTH: f64 = 1260.0;
    const HEIGHT: f64 = 330.0;
    let (left, right, top, mid, bottom) = (84.0, 1180.0, 34.0, 154.0, 274.0);
    let x = Linear::new((0.0, 1.0), (left, right));
    let up = Linear::new((0.0, ticks.hi), (mid, top));
    let down = Linear::new((0.0, ticks.hi), (mid, bottom));
    let mut out = String::new();
    open(
        &mut out,
        "propensity-chart",
        WIDTH,
        HEIGHT,
        "propensities of treated and control units against the overlap thresholds",
    );
    // Extreme regions.
    let eps = t.eps.clamp(0.0, 0.5);
    for (a, b) in [(0.0, eps), (1.0 - eps, 1.0)] {
        put!(
            out,
            r##"<rect data-kind="extreme-region" x="{:.1}" y="{top}" width="{:.1}" height="{:.1}" fill="#fbe9e7"/>"##,
            x.at(a),
            x.at(b) - x.at(a),
            bottom - top
        );
    }
    // Share grid, mirrored.
    for &v in &ticks.values {
        for (s, sign) in [(&up, 1.0), (&down, -1.0)] {
            if v == 0.0 && sign < 0.0 {
                continue;
            }
            let py = s.at(v);
            put!(
                out,
                r#"<line x1="{left}" y1="{py:.1}" x2="{right}" y2="{py:.1}" stroke="{GRID}"/><text class="tick" x="{:.1}" y="{:.1}" text-anchor="end">{}%</text>"#,
                left - 8.0,
                py + 4.0,
                scale::tick_label(100.0 * v, 100.0 * ticks.step)
            );
        }
    }
    for (arm, counts, n, scale_y, color) in [
        ("treated", &p.treated, nt, &up, TREATED),
        ("control", &p.control, nc, &down, CONTROL),
    ] {
        for (i, &c) in counts.iter().enumerate().take(bins).filter(|(_, &c)| c > 0) {
            let (a, b) = (i as f64 / bins as f64, (i + 1) as f64 / bins as f64);
            let share = c as f64 / n;
            let (y0, y1) = (scale_y.at(0.0), scale_y.at(share));
            put!(
                out,
                r#"<rect data-kind="propensity-bar" data-arm="{arm}" data-bin="{i}" data-count="{c}" x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="{color}" fill-opacity="0.85"><title>{arm}: {c} units ({}) with propensity {a:.2} to {b:.2}</title></rect>"#,
                x.at(a) + 1.0,
                y0.min(y1),
                (x.at(b) - x.at(a) - 2.0).max(1.0),
                (y1 - y0).abs().max(1.0),
                scale::percent(share)
            );
        }
    }
    put!(
        out,
        r#"<line x1="{left}" y1="{mid}" x2="{right}" y2="{mid}" stroke="{INK}"/>"#
    );
    // Thresholds.
    for (at, label) in [
        (eps, format!("eps = {eps}")),
        (1.0 - eps, format!("1 − eps = {}", 1.0 - eps)),
    ] {
        let px = x.at(at);
        put!(
            out,
            r#"<line data-kind="overlap-threshold" data-at="{at}" x1="{px:.1}" y1="{:.1}" x2="{px:.1}" y2="{bottom}" stroke="{THRESHOLD}" stroke-width="1.8" stroke-dasharray="6 3"/><text class="small threshold" x="{px:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
            top - 14.0,
            top - 18.0,
            Esc(&label)
        );
    }
    // Propensity axis at the bottom.
    for i in 0..=10 {
        let v = i as f64 / 10.0;
        let px = x.at(v);
        put!(
            out,
            r#"<line x1="{px:.1}" y1="{bottom}" x2="{px:.1}" y2="{:.1}" stroke="{INK}"/><text class="tick" x="{px:.1}" y="{:.1}" text-anchor="middle">{v:.1}</text>"#,
            bottom + 5.0,
            bottom + 20.0
        );
    }
    put!(
        out,
        r#"<line x1="{left}" y1="{bottom}" x2="{right}" y2="{bottom}" stroke="{INK}"/><text class="axis" x="{:.1}" y="{:.1}" text-anchor="middle">propensity (estimated chance of treatment)</text><text class="axis" transform="translate(22 {mid}) rotate(-90)" text-anchor="middle">share of the arm</text>"#,
        (left + right) / 2.0,
        bottom + 46.0
    );
    put!(
        out,
        r#"<text class="arm" x="{:.1}" y="{:.1}" fill="{TREATED}">▲ treated ({} units)</text><text class="arm" x="{:.1}" y="{:.1}" fill="{CONTROL}">▼ control ({} units)</text>"#,
        left + 10.0 + x.at(eps) - left,
        top + 16.0,
        nt as u64,
        left + 10.0 + x.at(eps) - left,
        bottom - 8.0,
        nc as u64
    );
    out.push_str("</svg>");
    out
}

/// Each arm's generalized propensity over every unit, one row per arm:
/// its whole range as a thin line, the 1% to 99% quantiles thicker, the
/// 5% to 95% quantiles as a box with the median marked, on one [0, 1]
/// axis with the region below eps shaded and the threshold drawn; beside
/// each row its share below eps and its effective sample share.
pub fn arm_propensity_chart(arms: &[ArmPropensity], t: &Thresholds) -> String {
    if arms.is_empty() {
        return note("No generalized propensities on this board.");
    }
    const WIDTH: f64 = 1260.0;
    const TOP: f64 = 44.0;
    const ROW: f64 = 46.0;
    let (left, right) = (190.0, 900.0);
    let bottom = TOP + ROW * arms.len() as f64;
    let height = bottom + 62.0;
    let x = Linear::new((0.0, 1.0), (left, right));
    let eps = t.eps.clamp(0.0, 1.0);
    let mut out = String::new();
    open(
        &mut out,
        "arm-propensity-chart",
        WIDTH,
        height,
        "each arm's generalized propensity against the overlap threshold",
    );
    put!(
        out,
        r#"<text class="head" x="16" y="18">arm (units)</text><text class="head" x="{:.1}" y="18" text-anchor="middle">chance of the arm given the features, over every unit</text><text class="head" x="930" y="18">below eps</text><text class="head" x="1070" y="18">effective sample</text>"#,
        (left + right) / 2.0
    );
    put!(
        out,
        r##"<rect data-kind="extreme-region" x="{left}" y="{:.1}" width="{:.1}" height="{:.1}" fill="#fbe9e7"/>"##,
        TOP - 8.0,
        x.at(eps) - left,
        bottom - TOP + 8.0
    );
    for i in 0..=10 {
        let v = i as f64 / 10.0;
        let px = x.at(v);
        put!(
            out,
            r#"<line x1="{px:.1}" y1="{:.1}" x2="{px:.1}" y2="{bottom:.1}" stroke="{GRID}"/><text class="tick" x="{px:.1}" y="{:.1}" text-anchor="middle">{v:.1}</text>"#,
            TOP - 8.0,
            bottom + 18.0
        );
    }
    for (i, a) in arms.iter().enumerate() {
        let y = TOP + ROW * i as f64 + ROW / 2.0;
        let color = ARM_COLORS[i % ARM_COLORS.len()];
        let q = |p: f64| a.quantile(p).filter(|v| v.is_finite());
        put!(
            out,
            r#"<g data-kind="arm-propensity" data-arm="{}" data-units="{}" data-extreme-share="{}" data-effective-share="{}""#,
            Esc(&a.arm),
            a.units,
            a.extreme_share,
            a.effective_share
        );
        for (name, p) in [("q05", 0.05), ("median", 0.5), ("q95", 0.95)] {
            if let Some(v) = q(p) {
                put!(out, r#" data-{name}="{v}""#);
            }
        }
        out.push('>');
        put!(
            out,
            "<title>{}: 5% to 95% of units between {} and {}, median {}; {} below eps {eps}</title>",
            Esc(&a.arm),
            q(0.05).map(scale::sig).unwrap_or_default(),
            q(0.95).map(scale::sig).unwrap_or_default(),
            q(0.5).map(scale::sig).unwrap_or_default(),
            scale::percent(a.extreme_share)
        );
        put!(
            out,
            r#"<rect x="16" y="{:.1}" width="10" height="10" rx="2" fill="{color}"/><text class="name" x="32" y="{:.1}">{}{} <tspan class="muted">({})</tspan></text>"#,
            y - 5.0,
            y + 4.5,
            Esc(&short(&a.arm, 16)),
            if i == 0 { " (reference)" } else { "" },
            a.units
        );
        if let (Some(lo), Some(hi)) = (q(0.0), q(1.0)) {
            put!(
                out,
                r#"<line data-kind="arm-propensity-range" x1="{:.1}" y1="{y:.1}" x2="{:.1}" y2="{y:.1}" stroke="{color}" stroke-width="1.5"/>"#,
                x.at(lo),
                x.at(hi)
            );
        }
        if let (Some(lo), Some(hi)) = (q(0.01), q(0.99)) {
            put!(
                out,
                r#"<line x1="{:.1}" y1="{y:.1}" x2="{:.1}" y2="{y:.1}" stroke="{color}" stroke-width="4"/>"#,
                x.at(lo),
                x.at(hi)
            );
        }
        if let (Some(lo), Some(hi)) = (q(0.05), q(0.95)) {
            put!(
                out,
                r#"<rect data-kind="arm-propensity-box" data-arm="{}" x="{:.1}" y="{:.1}" width="{:.1}" height="16" rx="3" fill="{color}" fill-opacity="0.85"/>"#,
                Esc(&a.arm),
                x.at(lo),
                y - 8.0,
                (x.at(hi) - x.at(lo)).max(1.5)
            );
        }
        if let Some(m) = q(0.5) {
            put!(
                out,
                r#"<line x1="{:.1}" y1="{:.1}" x2="{:.1}" y2="{:.1}" stroke="{INK}" stroke-width="2.5"/>"#,
                x.at(m),
                y - 10.0,
                x.at(m),
                y + 10.0
            );
        }
        let over = a.extreme_share > t.max_extreme_share;
        let thin = a.effective_share < t.min_effective_share;
        put!(
            out,
            r#"<text class="num{}" x="930" y="{:.1}">{}</text><text class="num{}" x="1070" y="{:.1}">{} of the arm</text></g>"#,
            if over { " threshold" } else { "" },
            y + 4.5,
            scale::percent(a.extreme_share),
            if thin { " threshold" } else { "" },
            y + 4.5,
            scale::percent(a.effective_share)
        );
    }
    let px = x.at(eps);
    put!(
        out,
        r#"<line data-kind="overlap-threshold" data-at="{eps}" x1="{px:.1}" y1="{:.1}" x2="{px:.1}" y2="{bottom:.1}" stroke="{THRESHOLD}" stroke-width="1.8" stroke-dasharray="6 3"/><text class="small threshold" x="{px:.1}" y="{:.1}" text-anchor="middle">eps = {eps}</text>"#,
        TOP - 14.0,
        TOP - 18.0
    );
    put!(
        out,
        r#"<line x1="{left}" y1="{bottom:.1}" x2="{right}" y2="{bottom:.1}" stroke="{INK}"/><text class="axis" x="{:.1}" y="{:.1}" text-anchor="middle">generalized propensity (thin: every unit; thick: 1% to 99%; box: 5% to 95%; bar: median)</text>"#,
        (left + right) / 2.0,
        bottom + 44.0
    );
    out.push_str("</svg>");
    out
}

/// The colour of an event's kind: attention, good news, refits, registry.
pub fn event_color(kind: &str) -> &'static str {
    match kind {
        "model_registered" | "model_retired" => BASELINE,
        "nuisance_refit" => CONTROL,
        k if k.ends_with("_recovered") || k.ends_with("_settled") || k.ends_with("_detected") => {
            "#2E7D4F"
        }
        _ => THRESHOLD,
    }
}

/// The events on a time axis, one lane per kind (in order of first
/// appearance), each a marker with its message as a tooltip.
pub fn event_timeline(events: &[EventRecord]) -> String {
    if events.is_empty() {
        return note("No events yet.");
    }
    let mut kinds: Vec<&str> = Vec::new();
    for e in events {
        if !kinds.contains(&e.kind.as_str()) {
            kinds.push(&e.kind);
        }
    }
    let (t0, t1) = events.iter().fold((i64::MAX, i64::MIN), |(a, b), e| {
        (a.min(e.at_ms), b.max(e.at_ms))
    });
    let (t0, t1) = scale::time_domain(t0, t1, MIN_TIME_SPAN_MS);

    const WIDTH: f64 = 1260.0;
    const LANE: f64 = 28.0;
    let (left, right, top) = (250.0, 1230.0, 12.0);
    let bottom = top + LANE * kinds.len() as f64;
    let height = bottom + 52.0;
    let x = Linear::new((t0 as f64, t1 as f64), (left, right));
    let mut out = String::new();
    open(
        &mut out,
        "event-timeline",
        WIDTH,
        height,
        "the dataset's events over time, one lane per kind",
    );
    for (i, k) in kinds.iter().enumerate() {
        let y = top + LANE * i as f64 + LANE / 2.0;
        if i % 2 == 0 {
            put!(
                out,
                r##"<rect x="8" y="{:.1}" width="{:.1}" height="{LANE}" fill="#f6f7f9"/>"##,
                y - LANE / 2.0,
                WIDTH - 16.0
            );
        }
        put!(
            out,
            r#"<text class="name" x="16" y="{:.1}">{}</text>"#,
            y + 4.5,
            Esc(&short(k, 30))
        );
    }
    time_grid(&mut out, &x, (t0, t1), 8, top, bottom);
    put!(
        out,
        r#"<line x1="{left}" y1="{bottom}" x2="{right}" y2="{bottom}" stroke="{INK}"/><text class="axis" x="{:.1}" y="{:.1}" text-anchor="middle">time (UTC)</text>"#,
        (left + right) / 2.0,
        bottom + 42.0
    );
    for e in events {
        let lane = kinds.iter().position(|k| *k == e.kind).unwrap_or(0);
        let y = top + LANE * lane as f64 + LANE / 2.0;
        put!(
            out,
            r##"<circle data-kind="event" data-event="{}" data-id="{}" cx="{:.1}" cy="{y:.1}" r="6" fill="{}" fill-opacity="0.85" stroke="#fff" stroke-width="1.2"><title>{}: {}</title></circle>"##,
            Esc(&e.kind),
            e.id,
            x.at(e.at_ms as f64),
            event_color(&e.kind),
            scale::datetime(e.at_ms),
            Esc(&e.summary)
        );
    }
    out.push_str("</svg>");
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::domain::{Adjusted, HistoryRow};
    use crate::page::tests::board;

    fn count(s: &str, needle: &str) -> usize {
        s.matches(needle).count()
    }

    #[test]
    fn the_board_draws_one_interval_per_ranked_model_on_one_axis() {
        let mut b = board("d", &["alpha", "beta", "gamma"]);
        b.front_runner_vs_constant = Some(Adjusted {
            estimate: -0.5,
            ci_low: -0.8,
            ci_high: -0.1,
        });
        let s = board_chart(&b, &Colors::of(&b));
        assert_eq!(
            count(&s, r#"data-kind="interval""#),
            4,
            "three models and constant-effect"
        );
        // The test board's constant-effect row has no joint interval.
        assert_eq!(count(&s, r#"data-kind="joint-interval""#), 3);
        assert_eq!(count(&s, r#"data-kind="zero-line""#), 1);
        assert_eq!(count(&s, r#"data-kind="adjusted-interval""#), 1);
        assert_eq!(count(&s, r#"data-front-runner="true""#), 1);
        assert_eq!(count(&s, r#"data-kind="chance""#), 4);
        assert!(s.contains(
            r#"data-kind="board-row" data-model="alpha" data-rank="1" data-front-runner="true""#
        ));
        assert!(s.contains("(baseline)"));
        assert_eq!(count(&s, "<svg"), 1);
        assert_eq!(count(&s, "</svg>"), 1);
        assert_eq!(count(&s, r#"data-kind="cut-mark""#), 0);
    }

    #[test]
    fn a_far_baseline_is_cut_at_the_edge_not_squeezing_the_models() {
        let mut b = board("d", &["alpha", "beta"]);
        let mut zero = b.models[2].clone();
        zero.name = crate::estimate::data::ZERO_EFFECT.into();
        zero.rank = 4;
        zero.vs_constant = crate::domain::Difference {
            estimate: 40.0,
            se: 1.0,
            ci_low: 38.0,
            ci_high: 42.0,
            p_value: 0.0,
            joint: Some((37.0, 43.0)),
        };
        b.models.push(zero);
        let s = board_chart(&b, &Colors::of(&b));
        assert_eq!(count(&s, r#"data-kind="interval""#), 4, "still one per row");
        assert_eq!(count(&s, r#"data-cut="true""#), 1);
        assert_eq!(count(&s, r#"data-kind="cut-mark""#), 1);
        assert_eq!(
            count(&s, r#"data-kind="estimate""#),
            3,
            "its estimate is off the axis"
        );
        assert!(
            !s.contains(">40<") && !s.contains(">20<"),
            "the axis stays on the models"
        );
    }

    #[test]
    fn a_degenerate_board_says_why() {
        let mut b = board("d", &["a"]);
        b.degenerate = "only one arm <here>".into();
        let s = board_chart(&b, &Colors::of(&b));
        assert!(!s.contains("<svg"));
        assert!(s.contains("only one arm &lt;here&gt;"));
    }

    #[test]
    fn names_are_escaped_in_every_chart() {
        let evil = "<script>alert(1)</script>";
        let b = board("d", &[evil, "ok"]);
        let colors = Colors::of(&b);
        let history = vec![ModelHistory {
            model: evil.into(),
            points: vec![HistoryRow {
                snapshot_id: 1,
                computed_at_ms: 1000,
                estimate: 0.1,
                se: 0.05,
                rank: 1,
                units: 10,
            }],
        }];
        let events = vec![EventRecord {
            id: 1,
            dataset: "d".into(),
            kind: evil.into(),
            at_ms: 1000,
            snapshot_id: 1,
            summary: evil.into(),
            details_json: String::new(),
        }];
        for s in [
            board_chart(&b, &colors),
            history_chart(&history, &colors),
            event_timeline(&events),
        ] {
            assert!(!s.contains("<script"), "{s}");
            assert!(s.contains("&lt;script&gt;"), "{s}");
        }
    }

    #[test]
    fn history_draws_a_line_and_band_per_model_with_a_legend() {
        let b = board("d", &["a", "b"]);
        let lines: Vec<ModelHistory> = ["a", "b"]
            .iter()
            .map(|m| ModelHistory {
                model: (*m).into(),
                points: (0..5)
                    .map(|i| HistoryRow {
                        snapshot_id: i,
                        computed_at_ms: 1_000_000 + 60_000 * i,
                        estimate: -0.1 * i as f64,
                        se: 0.05,
                        rank: 1,
                        units: 100 * i,
                    })
                    .collect(),
            })
            .collect();
        let s = history_chart(&lines, &Colors::of(&b));
        assert_eq!(count(&s, r#"data-kind="history-line""#), 2);
        assert_eq!(count(&s, r#"data-kind="history-band""#), 2);
        assert_eq!(count(&s, r#"data-kind="legend-item""#), 2);
        assert!(s.contains(r#"data-points="5""#));
        assert!(history_chart(&[], &Colors::default()).contains("No history yet"));
    }

    #[test]
    fn propensities_of_both_arms_meet_the_thresholds() {
        let p = Propensities {
            treated: vec![0, 1, 4, 9, 3],
            control: vec![6, 5, 2, 0, 0],
        };
        let t = Thresholds {
            eps: 0.05,
            max_extreme_share: 0.1,
            min_effective_share: 0.2,
        };
        let s = propensity_chart(&p, &t);
        assert_eq!(
            count(&s, r#"data-arm="treated""#),
            4,
            "empty bins are not drawn"
        );
        assert_eq!(count(&s, r#"data-arm="control""#), 3);
        assert_eq!(count(&s, r#"data-kind="overlap-threshold""#), 2);
        assert!(s.contains(r#"data-at="0.05""#) && s.contains(r#"data-at="0.95""#));
    }

    #[test]
    fn events_sit_in_one_lane_per_kind() {
        let e = |id: i64, kind: &str| EventRecord {
            id,
            dataset: "d".into(),
            kind: kind.into(),
            at_ms: 1_000_000 + 1000 * id,
            snapshot_id: 1,
            summary: format!("event {id}"),
            details_json: String::new(),
        };
        let s = event_timeline(&[
            e(1, "model_registered"),
            e(2, "model_registered"),
            e(3, "nuisance_refit"),
        ]);
        assert_eq!(count(&s, r#"data-kind="event""#), 3);
        assert_eq!(count(&s, ">model_registered</text>"), 1);
        assert_eq!(event_color("overlap_recovered"), "#2E7D4F");
        assert_eq!(event_color("overlap_degraded"), THRESHOLD);
    }

    #[test]
    fn long_names_are_cut() {
        assert_eq!(short("abcdef", 4), "abc…");
        assert_eq!(short("abc", 4), "abc");
    }
}
