//! The demo's three-arm section: after the ride-credit weeks the invented
//! bike-share scheme chooses among three offers (no offer, a single-ride
//! credit and a week pass, each with a cost in rides), assigns them by a
//! rule that favours credits for low-usage members and passes for weekday
//! commuters (confounded, with the rule's probabilities logged), and asks
//! which of three models, each predicting both offers' effects against no
//! offer, picks offers best. The effects are known, so the printout can be
//! read against the truth: `offer-forest` predicts them (with noise) and is
//! right by construction on both contrasts.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value};

use crate::api::pb;
use crate::synth::standard_normal;

use super::board_table::{self, Row};
use super::demo::{
    new_events, recompute, register_models, say, send_rides, status, watched_line, Client,
    DemoResult,
};

pub const DATASET: &str = "ride-offers";
/// The reference first.
pub const ARMS: [&str; 3] = ["no-offer", "ride-credit", "week-pass"];
/// Cost of each arm in rides (what the scheme gives up per offer).
const COSTS: [f64; 3] = [0.0, 0.5, 2.0];
/// The season's ride counts arrive in this many months, a recompute after each.
const MONTHS: usize = 3;
const FEATURES: [&str; 3] = ["rides_90d", "weekday_share", "dock_km"];
const MODELS: [(&str, &str); 3] = [
    ("offer-forest", "forest fitted on both offers' trial"),
    ("usage-rules", "credit by past usage, a flat pass effect"),
    ("flat-uplift", "one average effect per offer"),
];
/// Members in the season the section scores.
pub const MEMBERS: usize = 3000;

struct Member {
    key: String,
    x: [f64; 3],
    arm: usize,
    propensity: f64,
    rides: f64,
    /// True effect of each arm against no offer (0 for the reference).
    tau: [f64; 3],
    /// Per model, the predicted effect of ride-credit and week-pass.
    predictions: [[f64; 2]; 3],
}

/// True effects on rides in the next 30 days of each arm against no offer:
/// a credit helps low-usage members and those near a dock; a week pass
/// helps weekday commuters.
fn effects(x: &[f64; 3]) -> [f64; 3] {
    let low_usage = if x[0] < 10.0 { 1.0 } else { 0.0 };
    [
        0.0,
        0.5 + 2.5 * low_usage - 0.5 * x[2],
        -0.5 + 6.0 * x[1] - 0.8 * x[2],
    ]
}

/// The scheme's assignment rule: a softmax favouring credits for low-usage
/// members and passes for members who ride on weekdays.
fn assignment(x: &[f64; 3]) -> [f64; 3] {
    let low_usage = if x[0] < 10.0 { 1.0 } else { 0.0 };
    let eta = [0.0, 1.2 * low_usage - 0.3, 2.0 * (x[1] - 0.5)];
    let total: f64 = eta.iter().map(|e| e.exp()).sum();
    eta.map(|e| e.exp() / total)
}

fn season(rng: &mut ChaCha8Rng) -> Vec<Member> {
    (0..MEMBERS)
        .map(|i| {
            let rides = (2.0 + 0.8 * standard_normal(rng)).exp().min(120.0).round();
            let weekday: f64 = rng.gen_range(0.0..1.0);
            let dock = (-0.4 + 0.6 * standard_normal(rng)).exp();
            let x = [rides, weekday, dock];
            let tau = effects(&x);
            let p = assignment(&x);
            let u: f64 = rng.gen();
            let arm = if u < p[0] {
                0
            } else if u < p[0] + p[1] {
                1
            } else {
                2
            };
            let base = 4.0 + 0.15 * rides - 0.5 * dock + weekday;
            let y = base + tau[arm] + 1.5 * standard_normal(rng);
            let low_usage = if rides < 10.0 { 1.0 } else { 0.0 };
            let predictions = [
                [
                    tau[1] + 0.3 * standard_normal(rng),
                    tau[2] + 0.3 * standard_normal(rng),
                ],
                [0.3 + 2.5 * low_usage, 2.0],
                [1.2, 2.3],
            ];
            Member {
                key: format!("s-m{i:04}"),
                x,
                arm,
                propensity: p[arm],
                rides: y.max(0.0).round(),
                tau,
                predictions,
            }
        })
        .collect()
}

async fn send(c: &mut Client, members: &[Member], cohort: &str) -> DemoResult<u64> {
    let units: Vec<pb::UnitBatch> = members
        .chunks(1000)
        .map(|chunk| pb::UnitBatch {
            dataset: DATASET.into(),
            rows: chunk
                .iter()
                .map(|m| pb::UnitRow {
                    key: m.key.clone(),
                    features: m.x.to_vec(),
                    treatment: 0,
                    propensity: Some(m.propensity),
                    cohort: cohort.into(),
                    assigned_at_ms: 0,
                    arm: ARMS[m.arm].into(),
                })
                .collect(),
        })
        .collect();
    c.intake
        .send_units(tokio_stream::iter(units))
        .await
        .map_err(status("arm units"))?;
    let mut preds = Vec::new();
    for (k, (name, _)) in MODELS.iter().enumerate() {
        for (a, arm) in ARMS.iter().enumerate().skip(1) {
            for chunk in members.chunks(1000) {
                preds.push(pb::PredictionBatch {
                    dataset: DATASET.into(),
                    rows: chunk
                        .iter()
                        .map(|m| pb::PredictionRow {
                            model: (*name).into(),
                            unit_key: m.key.clone(),
                            effect: m.predictions[k][a - 1],
                            predicted_at_ms: 0,
                            arm: (*arm).into(),
                        })
                        .collect(),
                });
            }
        }
    }
    c.intake
        .send_predictions(tokio_stream::iter(preds))
        .await
        .map_err(status("arm predictions"))?;
    let rides = members.iter().map(|m| (m.key.clone(), m.rides));
    send_rides(c, DATASET, rides, "arm outcomes").await
}

/// The arm a model's predictions give a member: the largest predicted
/// effect net of cost, no offer when none is positive (the service's rule).
fn chosen(pred: &[f64; 2]) -> usize {
    let mut best = (0, 0.0);
    for (a, p) in pred.iter().enumerate() {
        let net = p - COSTS[a + 1];
        if net > best.1 {
            best = (a + 1, net);
        }
    }
    best.0
}

/// True per-member gain over giving no offer of model `k`'s choices, net
/// of cost.
fn true_gain(members: &[Member], k: usize) -> f64 {
    members
        .iter()
        .map(|m| {
            let a = chosen(&m.predictions[k]);
            m.tau[a] - COSTS[a]
        })
        .sum::<f64>()
        / members.len() as f64
}

/// True PEHE (root mean squared error) of model `k` on contrast `a`.
fn true_pehe(members: &[Member], k: usize, a: usize) -> f64 {
    (members
        .iter()
        .map(|m| (m.predictions[k][a - 1] - m.tau[a]).powi(2))
        .sum::<f64>()
        / members.len() as f64)
        .sqrt()
}

fn interval(v: &Option<pb::IntervalValue>) -> String {
    let v = v.unwrap_or_default();
    format!(
        "{:>8} [{}, {}]",
        board_table::signed(v.estimate),
        board_table::signed(v.ci_low),
        board_table::signed(v.ci_high)
    )
}

fn interval_json(v: &Option<pb::IntervalValue>) -> Value {
    v.map_or(
        Value::Null,
        |v| json!({"estimate": v.estimate, "se": v.se, "ci_low": v.ci_low, "ci_high": v.ci_high}),
    )
}

/// Runs the section on its own dataset and returns its part of the JSON
/// summary.
pub async fn run(c: &mut Client, seed: u64) -> DemoResult<Value> {
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(pb::DatasetSpec {
                name: DATASET.into(),
                feature_names: FEATURES.iter().map(|f| f.to_string()).collect(),
                outcome_kind: pb::OutcomeKind::Continuous as i32,
                recompute: Some(pb::RecomputePolicy {
                    every_outcomes: u32::MAX,
                    every_seconds: 86_400,
                    ..Default::default()
                }),
                seed,
                arms: ARMS.iter().map(|a| a.to_string()).collect(),
                arm_costs: ARMS
                    .iter()
                    .zip(COSTS)
                    .skip(1)
                    .map(|(arm, cost)| pb::ArmCost {
                        arm: (*arm).into(),
                        cost,
                    })
                    .collect(),
                ..Default::default()
            }),
        })
        .await
        .map_err(status("create arm dataset"))?;
    register_models(c, DATASET, &MODELS, "register arm model").await?;
    println!("\nthree offers: the scheme now chooses among no offer, a single-ride credit and a week pass");
    say(
        "",
        &format!(
            "dataset {DATASET}: arms {} (reference first; a credit costs {} rides, a pass {}); \
             {} features; {} models, each predicting both offers' effects against no offer",
            ARMS.join(", "),
            COSTS[1],
            COSTS[2],
            FEATURES.len(),
            MODELS.len()
        ),
    );
    // Its own stream, so the weeks above draw what they always drew.
    let mut rng = ChaCha8Rng::seed_from_u64(seed.wrapping_add(1000));
    let members = season(&mut rng);
    let counts: Vec<usize> = (0..ARMS.len())
        .map(|a| members.iter().filter(|m| m.arm == a).count())
        .collect();
    say(
        "",
        &format!(
            "season 1: {} members; offers by the scheme's rule (credits favoured for low-usage \
             members, passes for weekday riders): {}",
            members.len(),
            ARMS.iter()
                .zip(&counts)
                .map(|(a, n)| format!("{a} {n}"))
                .collect::<Vec<_>>()
                .join(", ")
        ),
    );
    // The season's ride counts arrive in three months, a recompute after
    // each: the first month's members fit the first nuisance models, and
    // the stream watch judges each contrast on the later months' members as
    // they arrive. Every recompute fits afresh on all members so far, so
    // the final boards are those of one recompute on the whole season.
    let (mut after, mut events) = (0u64, Vec::new());
    for (i, month) in members.chunks(members.len().div_ceil(MONTHS)).enumerate() {
        let n = send(c, month, &format!("month-{}", i + 1)).await?;
        let r = recompute(c, DATASET, "arm recompute").await?;
        println!(
            "  month {}: ride counts of {n} members arrived; recompute {} in {:.0} ms",
            i + 1,
            r.snapshot_id,
            r.millis
        );
        new_events(c, DATASET, &mut after, &mut events).await?;
    }
    let board = c
        .scoring
        .get_scoreboard(pb::GetScoreboardRequest {
            dataset: DATASET.into(),
            window: Some(pb::Window {
                kind: pb::window::Kind::Cumulative as i32,
                cohort: String::new(),
            }),
        })
        .await
        .map_err(status("arm scoreboard"))?
        .into_inner();

    let mut contrasts = Vec::new();
    for c in &board.contrasts {
        let a = ARMS
            .iter()
            .position(|x| *x == c.arm)
            .ok_or_else(|| format!("arm scoreboard: unknown contrast arm {:?}", c.arm))?;
        let true_ate = members.iter().map(|m| m.tau[a]).sum::<f64>() / members.len() as f64;
        println!("  contrast {} against {}:", c.arm, c.reference_arm);
        if !c.degenerate.is_empty() {
            println!("    (no scores: {})", c.degenerate);
            contrasts.push(json!({"arm": c.arm, "degenerate": c.degenerate}));
            continue;
        }
        let ate = c.ate.unwrap_or_default();
        println!(
            "    average effect {:+.2} rides (se {:.2}); true {:+.2}",
            ate.estimate, ate.se, true_ate
        );
        let rows: Vec<Row> = c
            .models
            .iter()
            .map(|m| Row::from_wire(m, &c.front_runner))
            .collect();
        print!("{}", board_table::render(&rows, false, "    "));
        let truths: Vec<(&str, f64)> = MODELS
            .iter()
            .enumerate()
            .map(|(k, (name, _))| (*name, true_pehe(&members, k, a)))
            .collect();
        say(
            "    ",
            &format!(
                "true root PEHE: {}",
                truths
                    .iter()
                    .map(|(name, v)| format!("{name} {v:.2}"))
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        );
        let view = c.alerts.clone().unwrap_or_default();
        say("    ", &watched_line(&view));
        contrasts.push(json!({
            "arm": c.arm,
            "reference_arm": c.reference_arm,
            "front_runner": c.front_runner,
            "watched": {
                "front_runner": view.front_runner,
                "settled": view.front_runner_settled,
                "units": view.units,
            },
            "ate": {"estimate": ate.estimate, "se": ate.se},
            "true_ate": true_ate,
            "models": rows.iter().map(|r| json!({
                "rank": r.rank,
                "name": r.name,
                "vs_constant": r.estimate,
                "interval": r.joint.unwrap_or(r.alone),
                "chance": r.chance,
                "true_root_pehe": truths.iter().find(|(n, _)| *n == r.name).map(|(_, v)| *v),
            })).collect::<Vec<_>>(),
        }));
    }

    let policy = board
        .arm_policy
        .as_ref()
        .ok_or("arm scoreboard: no arm policy report")?;
    let reference = ARMS[0];
    println!("  arm choice: each member gets the offer with the largest predicted effect net of");
    println!("  its cost, no offer when none is positive; rides per member net of cost (95% CI)");
    println!(
        "    everyone {reference:<12}{}",
        interval(&policy.reference_value)
    );
    println!(
        "    everyone {:<12}{}  (best single arm)",
        policy.best_single_arm,
        interval(&policy.best_single_arm_value)
    );
    println!(
        "    model          {:<28}{:<28} true  no/credit/pass",
        format!("vs everyone {reference}"),
        format!("vs everyone {}", policy.best_single_arm),
    );
    let mut models = Vec::new();
    for p in &policy.models {
        let k = MODELS.iter().position(|(name, _)| *name == p.model);
        let truth = k.map(|k| true_gain(&members, k));
        let shares: Vec<String> = ARMS
            .iter()
            .map(|a| {
                let s = p
                    .shares
                    .iter()
                    .find(|s| s.arm == *a)
                    .map_or(0.0, |s| s.share);
                format!("{:.0}%", 100.0 * s)
            })
            .collect();
        println!(
            "    {:<14}{:<28}{:<28}{:>6}  {}",
            p.model,
            interval(&p.vs_reference),
            interval(&p.vs_best_single_arm),
            truth.map_or("-".into(), |t| format!("{t:+.2}")),
            shares.join("/")
        );
        models.push(json!({
            "model": p.model,
            "value": interval_json(&p.value),
            "vs_reference": interval_json(&p.vs_reference),
            "vs_best_single_arm": interval_json(&p.vs_best_single_arm),
            "true_vs_reference": truth,
            "shares": p.shares.iter().map(|s| json!({"arm": s.arm, "share": s.share}))
                .collect::<Vec<_>>(),
        }));
    }
    println!("    pairwise (first's value minus second's):");
    for d in &policy.pairwise {
        println!(
            "      {:<28}{}",
            format!("{} - {}", d.first, d.second),
            interval(&d.difference)
        );
    }
    let true_best_single = (1..ARMS.len())
        .map(|a| members.iter().map(|m| m.tau[a] - COSTS[a]).sum::<f64>() / members.len() as f64)
        .fold(0.0, f64::max);
    say(
        "    ",
        &format!(
            "true: the choice's gain over everyone {reference} by the known effects (the best \
             single arm's: {true_best_single:+.2}); no/credit/pass: shares of members given each \
             offer"
        ),
    );
    Ok(json!({
        "dataset": DATASET,
        "arms": ARMS,
        "costs": COSTS,
        "units": board.units,
        "contrasts": contrasts,
        "policy": {
            "reference_value": interval_json(&policy.reference_value),
            "best_single_arm": policy.best_single_arm,
            "best_single_arm_value": interval_json(&policy.best_single_arm_value),
            "models": models,
            "pairwise": policy.pairwise.iter().map(|d| json!({
                "first": d.first,
                "second": d.second,
                "difference": interval_json(&d.difference),
            })).collect::<Vec<_>>(),
        },
    }))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The design the printout is read against: offer-forest's choices gain
    /// more than the others' by the known effects, and the rule gives every
    /// arm a fair share of members.
    #[test]
    fn the_right_model_gains_most_by_the_known_effects() {
        let members = season(&mut ChaCha8Rng::seed_from_u64(1007));
        let gains: Vec<f64> = (0..MODELS.len()).map(|k| true_gain(&members, k)).collect();
        println!("true gains over no offer: {gains:?}");
        assert!(gains[0] > gains[1] && gains[0] > gains[2], "{gains:?}");
        for (a, name) in ARMS.iter().enumerate() {
            let share = members.iter().filter(|m| m.arm == a).count() as f64 / MEMBERS as f64;
            println!("{name}: {share:.3}");
            assert!(share > 0.15, "{name}: {share}");
        }
        assert_eq!(chosen(&[0.4, 1.9]), 0, "neither beats its cost");
        assert_eq!(chosen(&[1.0, 2.6]), 2, "0.6 net against 0.5");
    }
}
