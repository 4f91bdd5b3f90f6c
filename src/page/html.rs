//! Whole HTML documents: the index of datasets, one dataset's page, the
//! sign-in page a refused browser gets, and plain messages. One embedded
//! style sheet, no script, no external resource.

use std::fmt::Write;

use super::conditions::{Condition, State};
use super::scale;
use super::svg::{self, Colors};
use super::{
    arm_propensities, url_segment, DatasetSummary, DatasetView, Esc, Frame, Thresholds,
    HISTORY_SPAN_MS, WINDOW,
};
use crate::domain::Board;
use crate::estimate::arms::Valued;

macro_rules! put {
    ($($t:tt)*) => {{ let _ = write!($($t)*); }};
}

const STYLE: &str = r#"
:root { color-scheme: light; }
* { box-sizing: border-box; }
body { margin: 0; font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", "DejaVu Sans", Arial, sans-serif; color: #222; background: #eef0f3; }
.bar { background: #1f2a36; color: #e8edf2; padding: 10px 24px; display: flex; gap: 8px 22px; align-items: center; flex-wrap: wrap; }
.bar a { color: #bcd8ff; }
.bar .brand { font-weight: 700; color: #fff; font-size: 16px; }
.bar form { margin: 0 0 0 auto; }
.bar button { font: inherit; font-size: 13px; padding: 3px 10px; }
main { max-width: 1320px; margin: 0 auto; padding: 12px 20px 32px; }
section { background: #fff; border: 1px solid #d9dde3; border-radius: 6px; padding: 14px 18px; margin: 16px 0; }
h1 { font-size: 26px; margin: 10px 0 4px; }
h2 { font-size: 19px; margin: 0 0 4px; }
p { margin: 4px 0 10px; }
.lede, .note { color: #555; }
.facts { display: flex; flex-wrap: wrap; gap: 4px 24px; margin: 6px 0 4px; padding: 0; list-style: none; }
.facts b { font-variant-numeric: tabular-nums; }
svg { display: block; max-width: 100%; height: auto; }
svg text { font-family: inherit; font-size: 13.5px; fill: #222; }
svg .tick { font-size: 12.5px; fill: #555; font-variant-numeric: tabular-nums; }
svg .head { font-size: 12.5px; font-weight: 600; fill: #555; }
svg .axis { font-size: 13.5px; fill: #333; }
svg .small { font-size: 12.5px; fill: #444; }
svg .muted, svg tspan.muted { fill: #777; }
svg .front { font-weight: 700; }
svg .num { font-variant-numeric: tabular-nums; }
svg .threshold { fill: #C0392B; font-weight: 600; }
svg .arm { font-size: 14.5px; font-weight: 600; }
svg .legend text { font-size: 12.5px; fill: #333; }
.conditions { display: grid; grid-template-columns: repeat(auto-fill, minmax(235px, 1fr)); gap: 10px; margin: 8px 0; }
.condition { border-radius: 5px; padding: 8px 11px; border-left: 6px solid #9aa0a6; background: #f1f2f4; }
.condition.active { background: #fdecea; border-color: #C0392B; }
.condition.clear { background: #edf7f0; border-color: #2E7D4F; }
.condition .state { font-weight: 700; text-transform: uppercase; font-size: 12px; letter-spacing: .05em; }
.condition.active .state { color: #A52A1E; }
.condition.clear .state { color: #2E7D4F; }
.condition .title { font-weight: 600; }
.condition .detail { color: #444; font-size: 13.5px; }
.chip { display: inline-block; border-radius: 10px; padding: 1px 9px; margin: 1px 4px 1px 0; font-size: 13px; background: #fdecea; color: #A52A1E; border: 1px solid #f3c4bd; }
.chip.none { background: #edf7f0; color: #2E7D4F; border-color: #bfe0cb; }
table { border-collapse: collapse; width: 100%; }
th, td { text-align: left; padding: 6px 8px; border-bottom: 1px solid #e6e8eb; vertical-align: top; }
th { font-size: 13px; color: #555; font-weight: 600; }
td.time, td.num { white-space: nowrap; font-variant-numeric: tabular-nums; }
.kind { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: 13px; white-space: nowrap; }
.dot { display: inline-block; width: 10px; height: 10px; border-radius: 5px; margin-right: 6px; vertical-align: baseline; }
form.sign-in label { display: block; font-weight: 600; margin: 10px 0 4px; }
form.sign-in input[type=password] { width: 100%; max-width: 560px; padding: 8px; font: inherit; font-family: ui-monospace, "DejaVu Sans Mono", monospace; }
form.sign-in button { font: inherit; padding: 7px 16px; margin-top: 10px; }
.problem { color: #A52A1E; font-weight: 600; }
footer { color: #666; font-size: 13px; text-align: center; margin: 8px 0 24px; }
"#;

/// A whole document around `body`; `refresh` reloads it every so many
/// seconds.
fn document(title: &str, refresh: Option<u32>, bar: &str, body: &str, footer: &str) -> String {
    let mut out = String::with_capacity(body.len() + STYLE.len() + 1024);
    out.push_str("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">");
    out.push_str("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">");
    if let Some(s) = refresh {
        put!(out, "<meta http-equiv=\"refresh\" content=\"{s}\">");
    }
    put!(
        out,
        "<title>{}</title><style>{STYLE}</style></head><body>",
        Esc(title)
    );
    put!(out, "<div class=\"bar\">{bar}</div><main>{body}</main>");
    put!(
        out,
        "<footer data-kind=\"drawn\">{footer}</footer></body></html>\n"
    );
    out
}

/// The top bar: name, a link to the index, when drawn, and a way to forget
/// the page's cookie.
fn bar(f: &Frame, index_link: bool) -> String {
    let mut out = String::from(r#"<span class="brand">plumbline status</span>"#);
    if index_link {
        out.push_str(r#"<a href="/" data-kind="index-link">all datasets</a>"#);
    }
    put!(
        out,
        r#"<span>drawn <time data-kind="drawn-at" data-ms="{}">{}</time></span><span>reloads every {} s</span>"#,
        f.drawn_at_ms,
        scale::datetime(f.drawn_at_ms),
        f.refresh_seconds
    );
    if f.signed_in {
        out.push_str(
            r#"<form method="post" action="/sign-out"><button type="submit">forget my token</button></form>"#,
        );
    }
    out
}

fn footer(f: &Frame) -> String {
    format!(
        "Drawn by this server at {}; the page reloads itself every {} seconds.",
        scale::datetime(f.drawn_at_ms),
        f.refresh_seconds
    )
}

fn conditions_grid(out: &mut String, list: &[Condition]) {
    out.push_str(r#"<div class="conditions">"#);
    for c in list {
        put!(
            out,
            r#"<div class="condition {state}" data-kind="alert" data-alert="{}"{} data-state="{state}"><div class="state">{state}</div><div class="title">{}</div><div class="detail">{}</div></div>"#,
            c.key,
            arm_attribute(&c.arm),
            Esc(&condition_title(c)),
            Esc(&c.detail),
            state = c.state.word()
        );
    }
    out.push_str("</div>");
}

/// A condition's title, naming its contrast on a dataset with arms.
fn condition_title(c: &Condition) -> String {
    if c.arm.is_empty() {
        c.title.to_string()
    } else {
        format!("{}: {}", c.arm, c.title)
    }
}

/// ` data-arm="..."` for a condition of a contrast, nothing otherwise.
fn arm_attribute(arm: &str) -> String {
    if arm.is_empty() {
        String::new()
    } else {
        format!(r#" data-arm="{}""#, Esc(arm))
    }
}

/// The index: each dataset with its latest board's facts and the alert
/// conditions active now, linking to its own page.
pub fn index_page(list: &[DatasetSummary], f: &Frame) -> String {
    let mut body = String::from("<h1>Datasets</h1>");
    if list.is_empty() {
        body.push_str(
            r#"<section><p class="note" data-kind="no-data">No datasets yet. Create one with the DatasetRegistry API (<code>CreateDataset</code>) and it will be listed here.</p></section>"#,
        );
        return document(
            "plumbline status",
            Some(f.refresh_seconds),
            &bar(f, false),
            &body,
            &footer(f),
        );
    }
    put!(
        body,
        r#"<p class="lede">The {WINDOW} window of each dataset, as its latest recompute left it. Open a dataset for its board, history, overlap and events.</p><section><table><thead><tr><th>dataset</th><th>units</th><th>front-runner</th><th>last recompute</th><th>alerts now</th></tr></thead><tbody>"#
    );
    for d in list {
        put!(
            body,
            r#"<tr data-kind="dataset" data-dataset="{}"><td><a data-kind="dataset-link" href="/datasets/{}">{}</a></td>"#,
            Esc(&d.name),
            url_segment(&d.name),
            Esc(&d.name)
        );
        match &d.board {
            None => body.push_str(
                r#"<td class="num">–</td><td class="note">not scored yet</td><td class="time">–</td>"#,
            ),
            Some(b) => {
                let front = if !b.degenerate.is_empty() {
                    format!(r#"<span class="note">no scores: {}</span>"#, Esc(&b.degenerate))
                } else if !b.contrast_front_runners.is_empty() {
                    let parts: Vec<String> = b
                        .contrast_front_runners
                        .iter()
                        .map(|(arm, front)| {
                            format!(
                                r#"<span data-kind="contrast-front-runner" data-arm="{}">{}: {}</span>"#,
                                Esc(arm),
                                Esc(arm),
                                if front.is_empty() { "–".to_string() } else { Esc(front).to_string() }
                            )
                        })
                        .collect();
                    parts.join("; ")
                } else if b.front_runner.is_empty() {
                    "–".into()
                } else {
                    Esc(&b.front_runner).to_string()
                };
                put!(
                    body,
                    r#"<td class="num">{}</td><td>{front}</td><td class="time">{} ({} ago)</td>"#,
                    b.units,
                    scale::datetime(b.computed_at_ms),
                    scale::ago(f.drawn_at_ms - b.computed_at_ms)
                );
            }
        }
        body.push_str("<td>");
        let active: Vec<&Condition> = d
            .conditions
            .iter()
            .filter(|c| c.state == State::Active)
            .collect();
        if active.is_empty() {
            body.push_str(r#"<span class="chip none">none</span>"#);
        }
        for c in active {
            put!(
                body,
                r#"<span class="chip" data-kind="alert-chip" data-alert="{}"{}>{}</span>"#,
                c.key,
                arm_attribute(&c.arm),
                Esc(&condition_title(c))
            );
        }
        body.push_str("</td></tr>");
    }
    body.push_str("</tbody></table></section>");
    document(
        "plumbline status: datasets",
        Some(f.refresh_seconds),
        &bar(f, false),
        &body,
        &footer(f),
    )
}

/// One dataset: facts, alert conditions, board, history, propensities and
/// events.
pub fn dataset_page(v: &DatasetView, f: &Frame) -> String {
    let mut body = String::new();
    put!(
        body,
        r#"<h1 data-kind="dataset-name">{}</h1>"#,
        Esc(&v.name)
    );
    let colors = v.board.as_ref().map(Colors::of).unwrap_or_default();

    // Facts of the latest board.
    body.push_str(r#"<ul class="facts" data-kind="facts">"#);
    put!(body, "<li>window <b>{WINDOW}</b></li>");
    match &v.board {
        None => body.push_str("<li>not scored yet: send outcomes or call Recompute</li>"),
        Some(b) => {
            put!(body, "<li>units with outcomes <b>{}</b></li>", b.units);
            effect_and_front_runner(&mut body, b);
            put!(
                body,
                "<li>last recompute <b>{}</b> ({} ago), snapshot {}</li>",
                scale::datetime(b.computed_at_ms),
                scale::ago(f.drawn_at_ms - b.computed_at_ms),
                b.snapshot_id
            );
        }
    }
    body.push_str("</ul>");

    // Alerts now.
    body.push_str(r#"<section id="alerts"><h2>Alerts now</h2><p class="lede">The state of each alert condition at this moment, from the alerts' watch of the arriving units (the Prometheus rules add how long a condition must last before it fires).</p>"#);
    conditions_grid(&mut body, &v.conditions);
    if let Some(view) = v.board.as_ref().and_then(|b| b.alerts.as_ref()) {
        put!(
            body,
            r#"<p class="note">The watch has taken {} units over {} look{}."#,
            view.units,
            view.looks,
            if view.looks == 1 { "" } else { "s" }
        );
        if !view.drift.is_empty() {
            let mut drift: Vec<_> = view.drift.iter().collect();
            drift.sort_by(|a, b| {
                b.standardized_difference
                    .abs()
                    .total_cmp(&a.standardized_difference.abs())
            });
            body.push_str(
                " Largest drifts from the reference population (standardized mean difference): ",
            );
            let parts: Vec<String> = drift
                .iter()
                .take(5)
                .map(|d| {
                    format!(
                        "{} {}",
                        Esc(&d.quantity),
                        scale::signed(d.standardized_difference)
                    )
                })
                .collect();
            body.push_str(&parts.join(", "));
            body.push('.');
        }
        body.push_str("</p>");
    }
    if v.recompute_failures > 0 {
        put!(
            body,
            r#"<p class="problem" data-kind="recompute-failures">{} recomputes of this dataset failed on this server since it started; the service log names the cause.</p>"#,
            v.recompute_failures
        );
    }
    body.push_str("</section>");

    // A dataset with arms: a board per contrast, the arm choice, each
    // arm's generalized propensity; then history and events as always.
    let arms_board = v.board.as_ref().filter(|b| !b.contrasts.is_empty());
    if let Some(b) = arms_board {
        arms_sections(&mut body, b, &colors, &v.thresholds);
    }

    // The board.
    if arms_board.is_none() {
        body.push_str(r#"<section id="board"><h2>Board</h2>"#);
        match &v.board {
        None => body.push_str(r#"<p class="note" data-kind="no-data">Not scored yet: send outcomes or call Recompute.</p>"#),
        Some(b) => {
            body.push_str(r#"<p class="lede">Each ranked model's corrected PEHE minus constant-effect's, with its 95% interval; left of the dashed zero line a model errs less than predicting the average effect for everyone. "Chance lowest" is each model's chance of having the lowest error of all.</p>"#);
            body.push_str(&svg::board_chart(b, &colors));
            if !b.incomplete.is_empty() {
                let parts: Vec<String> = b
                    .incomplete
                    .iter()
                    .map(|m| format!("{} ({} of units)", Esc(&m.name), scale::percent(m.coverage)))
                    .collect();
                put!(
                    body,
                    r#"<p class="note">Left out for predicting too few units: {}.</p>"#,
                    parts.join(", ")
                );
            }
            if !b.caveat.is_empty() {
                put!(body, r#"<p class="note">{}</p>"#, Esc(&b.caveat));
            }
        }
    }
        body.push_str("</section>");
    }

    // History.
    put!(
        body,
        r#"<section id="history"><h2>Scores over time</h2><p class="lede">Each model's difference from constant-effect after every recompute of the last {} days before the latest board, with its 95% band (± 1.96 standard errors) shaded. Baselines are left out: the dashed zero line is constant-effect.</p>"#,
        HISTORY_SPAN_MS / 86_400_000
    );
    if v.contrast_history.is_empty() {
        body.push_str(&svg::history_chart(&v.history, &colors));
    }
    for (arm, lines) in &v.contrast_history {
        let reference = arms_board.map(|b| b.reference_arm.as_str()).unwrap_or("");
        put!(
            body,
            r#"<div data-kind="contrast-history" data-arm="{}"><h3>{} against {}</h3>{}</div>"#,
            Esc(arm),
            Esc(arm),
            Esc(reference),
            svg::history_chart(lines, &colors)
        );
    }
    body.push_str("</section>");

    // Overlap (a dataset with arms drew its own above).
    if arms_board.is_none() {
        body.push_str(r#"<section id="overlap"><h2>Propensity by arm</h2>"#);
        let t = &v.thresholds;
        put!(
            body,
            r#"<p class="lede">How likely each unit was to be treated, for treated units (above) and control units (below). Units in the shaded ends, outside [{}, {}], have an extreme propensity: their effects rest on extrapolation.</p>"#,
            t.eps,
            1.0 - t.eps
        );
        match &v.propensities {
            Some(p) => body.push_str(&svg::propensity_chart(p, t)),
            None => {
                body.push_str(r#"<p class="note" data-kind="no-data">No propensities yet.</p>"#)
            }
        }
        if let Some(o) = v.board.as_ref().and_then(|b| b.overlap.as_ref()) {
            body.push_str(r#"<ul class="facts" data-kind="overlap-facts">"#);
            put!(
                body,
                "<li>extreme share <b>{}</b> (limit {})</li>",
                scale::percent(o.extreme_share),
                scale::percent(t.max_extreme_share)
            );
            put!(
                body,
                "<li>effective sample <b>{}</b> of treated, <b>{}</b> of control (least {})</li>",
                scale::percent(o.treated_effective_share),
                scale::percent(o.control_effective_share),
                scale::percent(t.min_effective_share)
            );
            put!(
                body,
                "<li>outside [0.1, 0.9] <b>{}</b></li>",
                scale::percent(o.outside_crump_share)
            );
            put!(
                body,
                "<li>largest weight <b>{}</b> treated, <b>{}</b> control</li>",
                scale::percent(o.treated_max_weight),
                scale::percent(o.control_max_weight)
            );
            put!(
                body,
                "<li>at this look <b>{}</b></li>",
                if o.degraded {
                    "beyond a limit"
                } else {
                    "within limits"
                }
            );
            if !o.imbalanced_features.is_empty() {
                let names: Vec<String> = o
                    .imbalanced_features
                    .iter()
                    .map(|n| Esc(n).to_string())
                    .collect();
                put!(
                    body,
                    "<li>imbalanced after weighting <b>{}</b></li>",
                    names.join(", ")
                );
            }
            body.push_str("</ul>");
        }
        body.push_str("</section>");
    }

    // Events.
    body.push_str(r#"<section id="events"><h2>Events</h2>"#);
    put!(
        body,
        r#"<p class="lede">The latest {} events of the dataset on a timeline, one lane per kind; the list below has the newest first.</p>"#,
        v.events.len()
    );
    body.push_str(&svg::event_timeline(&v.events));
    if !v.events.is_empty() {
        body.push_str(r#"<table><thead><tr><th>time (UTC)</th><th>kind</th><th>message</th></tr></thead><tbody>"#);
        for e in v.events.iter().rev() {
            put!(
                body,
                r#"<tr data-kind="event-row" data-event="{}"><td class="time">{}</td><td class="kind"><span class="dot" style="background:{}"></span>{}</td><td>{}</td></tr>"#,
                Esc(&e.kind),
                scale::datetime(e.at_ms),
                svg::event_color(&e.kind),
                Esc(&e.kind),
                Esc(&e.summary)
            );
        }
        body.push_str("</tbody></table>");
    }
    body.push_str("</section>");

    document(
        &format!("{}: plumbline status", v.name),
        Some(f.refresh_seconds),
        &bar(f, true),
        &body,
        &footer(f),
    )
}

/// An estimate and its 95% interval as table cells: the value (signed
/// for a difference), then the interval.
fn valued_cells(v: &Valued, difference: bool) -> String {
    let show = |x: f64| {
        if difference {
            scale::signed(x)
        } else {
            scale::sig(x)
        }
    };
    format!(
        r#"<td class="num" data-value="{}">{}</td><td class="num">[{}, {}]</td>"#,
        v.estimate,
        show(v.estimate),
        show(v.ci_low),
        show(v.ci_high)
    )
}

/// A board's average effect and front-runner, as list items of its facts.
fn effect_and_front_runner(body: &mut String, b: &Board) {
    if let Some(ate) = b.ate {
        put!(
            body,
            "<li>average effect <b>{}</b> (se {})</li>",
            scale::signed(ate.estimate),
            scale::sig(ate.se)
        );
    }
    if !b.front_runner.is_empty() {
        put!(
            body,
            "<li>front-runner <b>{}</b></li>",
            Esc(&b.front_runner)
        );
    }
}

/// The sections of a dataset with arms: one board per contrast (the
/// binary board's chart, on that arm against the reference), the value of
/// each model's arm choice, and each arm's generalized propensity against
/// the overlap threshold.
fn arms_sections(body: &mut String, b: &Board, colors: &Colors, t: &Thresholds) {
    put!(
        body,
        r#"<section id="board"><h2>Boards per contrast</h2><p class="lede">One board per arm against the reference arm <b>{}</b>: each ranked model's corrected PEHE on that contrast minus constant-effect's, with its 95% interval; left of the dashed zero line a model errs less than predicting the contrast's average effect for everyone.</p>"#,
        Esc(&b.reference_arm)
    );
    for c in &b.contrasts {
        put!(
            body,
            r#"<div data-kind="contrast-board" data-arm="{}" data-front-runner="{}"><h3>{} against {}</h3><ul class="facts">"#,
            Esc(&c.arm),
            Esc(&c.front_runner),
            Esc(&c.arm),
            Esc(&c.reference_arm)
        );
        effect_and_front_runner(body, c);
        body.push_str("</ul>");
        body.push_str(&svg::board_chart(c, colors));
        body.push_str("</div>");
    }
    if let Some(c) = b.contrasts.first().filter(|c| !c.caveat.is_empty()) {
        put!(body, r#"<p class="note">{}</p>"#, Esc(&c.caveat));
    }
    body.push_str("</section>");

    body.push_str(r#"<section id="arm-policy"><h2>Choosing an arm</h2>"#);
    match &b.arm_policy {
        None => body.push_str(
            r#"<p class="note" data-kind="no-data">No arm-choice values on this board.</p>"#,
        ),
        Some(p) => {
            let reference = p
                .costs
                .first()
                .map(|c| c.arm.as_str())
                .unwrap_or(b.reference_arm.as_str());
            let costs: Vec<String> = p
                .costs
                .iter()
                .map(|c| format!("{} {}", Esc(&c.arm), scale::sig(c.cost)))
                .collect();
            put!(
                body,
                r#"<p class="lede">Each model's targeting rule gives every unit the arm with the largest predicted effect net of its cost (costs: {}), the reference when none is positive. Its value is the mean outcome per unit net of costs, from doubly robust scores, with 95% intervals; beside it, its difference from giving everyone <b>{}</b> and from giving everyone the best single arm, <b>{}</b>.</p>"#,
                costs.join(", "),
                Esc(reference),
                Esc(&p.best_single_arm)
            );
            let arms: Vec<&str> = p.costs.iter().map(|c| c.arm.as_str()).collect();
            put!(
                body,
                r#"<table data-kind="arm-policy"><thead><tr><th>policy</th><th>value</th><th>95% interval</th><th>vs everyone {}</th><th>95% interval</th><th>vs everyone {}</th><th>95% interval</th><th>arms given</th></tr></thead><tbody>"#,
                Esc(reference),
                Esc(&p.best_single_arm)
            );
            for (name, v) in [
                (format!("everyone {reference}"), &p.reference_value),
                (
                    format!("everyone {} (best single arm)", p.best_single_arm),
                    &p.best_single_arm_value,
                ),
            ] {
                put!(
                    body,
                    r#"<tr data-kind="arm-policy-fixed"><td class="note">{}</td>{}<td></td><td></td><td></td><td></td><td></td></tr>"#,
                    Esc(&name),
                    valued_cells(v, false)
                );
            }
            for m in &p.models {
                let shares: Vec<String> = arms
                    .iter()
                    .map(|a| {
                        let share = m
                            .shares
                            .iter()
                            .find(|s| s.arm == *a)
                            .map(|s| s.share)
                            .unwrap_or(0.0);
                        format!("{} {}", Esc(a), scale::percent(share))
                    })
                    .collect();
                put!(
                    body,
                    r#"<tr data-kind="arm-policy-row" data-model="{}" data-value="{}" data-vs-reference="{}" data-vs-best-single-arm="{}"><td><span class="dot" style="background:{}"></span>{}</td>{}{}{}<td>{}</td></tr>"#,
                    Esc(&m.model),
                    m.value.estimate,
                    m.vs_reference.estimate,
                    m.vs_best_single_arm.estimate,
                    colors.get(&m.model),
                    Esc(&m.model),
                    valued_cells(&m.value, false),
                    valued_cells(&m.vs_reference, true),
                    valued_cells(&m.vs_best_single_arm, true),
                    shares.join(", ")
                );
            }
            body.push_str("</tbody></table>");
            if !p.note.is_empty() {
                put!(body, r#"<p class="note">Note: {}</p>"#, Esc(&p.note));
            }
        }
    }
    body.push_str("</section>");

    body.push_str(r#"<section id="overlap"><h2>Propensity by arm</h2>"#);
    put!(
        body,
        r#"<p class="lede">How likely each unit was to get each arm, with every arm modelled at once (the generalized propensity). Units whose chance of an arm is below eps = {} (the shaded band) have that arm's effect resting on extrapolation; an arm's effective sample is the share of its units that the weights 1 / propensity leave in effect (limit {}).</p>"#,
        t.eps,
        scale::percent(t.min_effective_share)
    );
    body.push_str(&svg::arm_propensity_chart(
        &arm_propensities(&b.detail_json),
        t,
    ));
    body.push_str(r#"<ul class="facts" data-kind="overlap-facts">"#);
    for c in &b.contrasts {
        if let Some(o) = &c.overlap {
            put!(
                body,
                r#"<li data-arm="{}">{} against {}: effective sample <b>{}</b> / <b>{}</b>{}</li>"#,
                Esc(&c.arm),
                Esc(&c.arm),
                Esc(&c.reference_arm),
                scale::percent(o.treated_effective_share),
                scale::percent(o.control_effective_share),
                if o.degraded { ", beyond a limit" } else { "" }
            );
        }
    }
    body.push_str("</ul></section>");
}

/// What a browser without an acceptable token gets: why, and a form that
/// keeps a token in a cookie for this site only.
pub fn sign_in_page(problem: &str, next: &str, f: &Frame) -> String {
    let mut body = String::from("<h1>Sign in</h1><section>");
    body.push_str("<p>This page shows every dataset, so it needs an access token with the <code>admin</code> or <code>read:*</code> scope (the rule of <code>/metrics</code>). <code>plumbline token create --scope 'read:*'</code> makes one.</p>");
    if !problem.is_empty() {
        put!(
            body,
            r#"<p class="problem" data-kind="problem">{}</p>"#,
            Esc(problem)
        );
    }
    put!(
        body,
        r#"<form class="sign-in" data-kind="sign-in" method="post" action="/sign-in"><label for="token">Access token</label><input id="token" name="token" type="password" autocomplete="off" required placeholder="plb_…"><input type="hidden" name="next" value="{}"><br><button type="submit">Open the page</button></form>"#,
        Esc(next)
    );
    body.push_str(r#"<p class="note">The token is kept in a cookie that only this server receives and that scripts cannot read (HttpOnly, SameSite=Strict), never in the address. "Forget my token" at the top of the page removes it. Tools can send <code>authorization: Bearer &lt;token&gt;</code> instead.</p></section>"#);
    document(
        "plumbline status: sign in",
        None,
        r#"<span class="brand">plumbline status</span>"#,
        &body,
        &format!(
            "Drawn by this server at {}.",
            scale::datetime(f.drawn_at_ms)
        ),
    )
}

/// A plain message (not found, starting, unavailable).
pub fn message_page(title: &str, message: &str, f: &Frame) -> String {
    let body = format!(
        r#"<h1>{}</h1><section><p data-kind="message">{}</p><p><a href="/">all datasets</a></p></section>"#,
        Esc(title),
        Esc(message)
    );
    document(
        title,
        Some(f.refresh_seconds),
        &bar(f, true),
        &body,
        &footer(f),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::page::conditions::conditions;
    use crate::page::tests::board;
    use crate::page::{BoardFacts, Propensities, Thresholds};

    const EVIL: &str = "<script>alert(1)</script>";

    fn frame() -> Frame {
        Frame {
            drawn_at_ms: 1_709_210_096_000,
            signed_in: true,
            refresh_seconds: 60,
        }
    }

    fn view(name: &str, models: &[&str]) -> DatasetView {
        let b = board(name, models);
        DatasetView {
            name: name.into(),
            thresholds: Thresholds {
                eps: 0.05,
                max_extreme_share: 0.1,
                min_effective_share: 0.2,
            },
            conditions: conditions(Some(&b), &[], None, 0),
            board: Some(b),
            propensities: Some(Propensities {
                treated: vec![1, 2],
                control: vec![2, 1],
            }),
            history: vec![],
            contrast_history: vec![],
            events: vec![],
            recompute_failures: 0,
        }
    }

    #[test]
    fn a_dataset_page_is_one_document_that_refreshes_and_says_when() {
        let s = dataset_page(&view("shop", &["a", "b"]), &frame());
        assert!(s.starts_with("<!DOCTYPE html>"));
        assert!(s.contains(r#"<meta http-equiv="refresh" content="60">"#));
        assert!(s.contains("2024-02-29 12:34:56 UTC"));
        assert!(s.contains(r#"data-kind="board-chart""#));
        assert!(s.contains(r#"data-kind="propensity-chart""#));
        assert_eq!(s.matches(r#"data-kind="alert""#).count(), 5);
        assert!(
            s.contains(r#"action="/sign-out""#),
            "a signed-in page offers to forget"
        );
        for banned in ["<script", "http://", "https://", "@import", "url("] {
            let outside_svg_namespace = s.replace("http://www.w3.org/2000/svg", "");
            assert!(
                !outside_svg_namespace.contains(banned),
                "{banned} found: the page must fetch nothing"
            );
        }
    }

    /// A dataset with arms: a board chart per contrast under its arm, the
    /// generalized propensity per arm with the report's numbers, the
    /// arm-choice rows with the policy report's, and no binary board or
    /// histograms.
    #[test]
    fn a_dataset_with_arms_gets_a_board_per_contrast_its_arms_and_the_choice() {
        use crate::domain::ArmPolicyBoard;
        use crate::estimate::arms::{ArmCost, ArmPolicy, ArmShare};
        let contrast = |arm: &str, models: &[&str]| Board {
            arm: arm.into(),
            reference_arm: "none".into(),
            ..board("offers", models)
        };
        let valued = |estimate: f64| Valued {
            estimate,
            se: 0.1,
            ci_low: estimate - 0.196,
            ci_high: estimate + 0.196,
        };
        let top = Board {
            models: vec![],
            front_runner: String::new(),
            reference_arm: "none".into(),
            contrasts: vec![contrast("text", &["good", "flat"]), contrast("mail", &["flat", "good"])],
            detail_json: r#"{"propensity":[
                {"arm":"none","units":400,"quantiles":[[0.05,0.21],[0.5,0.33],[0.95,0.41]],
                 "effective_sample_size":390.0,"effective_share":0.975,"extreme_share":0.0,"clipped":0},
                {"arm":"text","units":300,"quantiles":[[0.05,0.125],[0.5,0.3],[0.95,0.5]],
                 "effective_sample_size":270.0,"effective_share":0.9,"extreme_share":0.0125,"clipped":2}]}"#
                .into(),
            arm_policy: Some(ArmPolicyBoard {
                costs: vec![
                    ArmCost { arm: "none".into(), cost: 0.0 },
                    ArmCost { arm: "text".into(), cost: 0.5 },
                ],
                reference_value: valued(1.0),
                best_single_arm: "text".into(),
                best_single_arm_value: valued(1.25),
                note: "n".into(),
                models: vec![ArmPolicy {
                    model: "good".into(),
                    value: valued(1.5),
                    vs_reference: valued(0.5),
                    vs_best_single_arm: valued(0.25),
                    shares: vec![ArmShare { arm: "text".into(), share: 0.75 }],
                }],
                pairwise: vec![],
            }),
            ..board("offers", &["x"])
        };
        let mut v = view("offers", &["x"]);
        v.board = Some(top);
        v.propensities = None;
        let s = dataset_page(&v, &frame());
        for arm in ["text", "mail"] {
            assert_eq!(
                s.matches(&format!(r#"data-kind="contrast-board" data-arm="{arm}""#))
                    .count(),
                1
            );
        }
        assert_eq!(s.matches(r#"data-kind="board-chart""#).count(), 2);
        // Two registered models and constant-effect on each contrast.
        assert_eq!(s.matches(r#"data-kind="interval""#).count(), 6);
        assert!(s.contains(
            r#"data-kind="arm-propensity" data-arm="text" data-units="300" data-extreme-share="0.0125" data-effective-share="0.9" data-q05="0.125" data-median="0.3" data-q95="0.5""#
        ));
        assert_eq!(s.matches(r#"data-kind="arm-propensity""#).count(), 2);
        assert!(s.contains(
            r#"data-kind="arm-policy-row" data-model="good" data-value="1.5" data-vs-reference="0.5" data-vs-best-single-arm="0.25""#
        ));
        assert!(s.contains("text 75.0%"), "the arms a model's rule gives");
        assert_eq!(s.matches(r#"data-kind="arm-policy-fixed""#).count(), 2);
        assert!(!s.contains(r#"data-kind="propensity-chart""#));
        assert!(
            !s.contains(r#"data-model="x""#),
            "the top board has no models"
        );
    }

    #[test]
    fn a_dataset_not_yet_scored_says_so_in_every_section() {
        let v = DatasetView {
            board: None,
            propensities: None,
            conditions: conditions(None, &[], None, 0),
            ..view("new", &["a"])
        };
        let s = dataset_page(&v, &frame());
        assert!(s.contains("Not scored yet"));
        assert!(s.contains("No history yet"));
        assert!(s.contains("No propensities yet"));
        assert!(s.contains("No events yet"));
        assert!(!s.contains(r#"data-kind="interval""#));
        assert_eq!(s.matches(r#"data-state="unknown""#).count(), 4);
    }

    #[test]
    fn names_with_markup_come_out_escaped() {
        let mut v = view(EVIL, &[EVIL, "b"]);
        v.events.push(crate::domain::EventRecord {
            id: 1,
            dataset: EVIL.into(),
            kind: "model_registered".into(),
            at_ms: 0,
            snapshot_id: 0,
            summary: format!("model {EVIL} registered"),
            details_json: String::new(),
        });
        let page = dataset_page(&v, &frame());
        let index = index_page(
            &[DatasetSummary {
                name: EVIL.into(),
                board: Some(BoardFacts {
                    units: 1,
                    front_runner: EVIL.into(),
                    computed_at_ms: 0,
                    degenerate: String::new(),
                    contrast_front_runners: vec![],
                }),
                conditions: vec![],
            }],
            &frame(),
        );
        let sign_in = sign_in_page(EVIL, EVIL, &frame());
        let message = message_page(EVIL, EVIL, &frame());
        for s in [page, index, sign_in, message] {
            assert!(!s.contains("<script"), "{s}");
            assert!(s.contains("&lt;script&gt;"));
        }
    }

    #[test]
    fn the_index_links_each_dataset_and_lists_active_alerts() {
        let b = board("shop", &["a"]);
        let mut c = conditions(Some(&b), &[], Some(0), 100 * 86_400_000);
        c.retain(|c| c.key == "no-outcomes");
        let s = index_page(
            &[DatasetSummary {
                name: "shop".into(),
                board: Some(BoardFacts::of(&b)),
                conditions: c,
            }],
            &frame(),
        );
        assert!(s.contains(r#"<a data-kind="dataset-link" href="/datasets/shop">shop</a>"#));
        assert_eq!(s.matches(r#"data-kind="alert-chip""#).count(), 1);
        assert!(index_page(&[], &frame()).contains("No datasets yet"));
    }

    #[test]
    fn the_sign_in_form_posts_and_never_puts_the_token_in_the_address() {
        let s = sign_in_page("", "/datasets/shop", &frame());
        assert!(s.contains(r#"method="post" action="/sign-in""#));
        assert!(s.contains(r#"type="password""#));
        assert!(s.contains(r#"name="next" value="/datasets/shop""#));
        assert!(
            !s.contains("http-equiv=\"refresh\""),
            "no reload while typing"
        );
        assert!(!s.contains("reloads itself"));
    }
}
