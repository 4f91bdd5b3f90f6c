use super::*;
use crate::estimate::watch::WatchSettings;
use crate::estimate::OutcomeKind;
use crate::monitor::cache::{ChunkedColumn, Columns};
use crate::synth::{candidates, draw, effect_moments, Design};

const D: usize = 4;

/// An input over the first `units` of a fixed draw, in cohorts of 1,000,
/// every unit with an outcome and a prediction from three models.
fn input(units: usize, nuisance: Option<NuisanceState>) -> RecomputeInput {
    let data = draw(Design::NieWagerB, 5000, D, 1.0, 17);
    let (_, var_tau) = effect_moments(Design::NieWagerB, 20_000, 3);
    let models = candidates(&data.tau, var_tau, 3, 5);
    let spec = DatasetSpec {
        refit_growth: 10.0,
        seed: 3,
        ..DatasetSpec::new(
            "t",
            (1..=D).map(|j| format!("x{j}")).collect(),
            OutcomeKind::Continuous,
        )
    }
    .normalized()
    .expect("spec");
    let cohorts = 5;
    let mut columns = Columns::new(D);
    let features = data.features.as_slice().expect("standard layout");
    for u in 0..units {
        columns.push_unit(
            &features[u * D..(u + 1) * D],
            data.treatment[u] as u8,
            None,
            (u / 1000) as u32,
        );
        columns.add_outcome(u, data.outcome[u], 0);
    }
    RecomputeInput {
        spec,
        arm_models: Vec::new(),
        columns,
        cohort_names: (0..cohorts).map(|c| format!("c{c}")).collect(),
        models: models
            .iter()
            .map(|m| {
                (
                    m.predictions.name.clone(),
                    ChunkedColumn::from_rows(1, &m.predictions.effects[..units]),
                )
            })
            .collect(),
        revision: 0,
        nuisance,
        arm_nuisance: None,
        max_fit_units: None,
        blend_models: BLEND_MODELS,
        now_ms: 0,
        ranks_fresh_below: RANKS_ALWAYS_FRESH_BELOW,
        watch: Watch::default(),
        watch_settings: WatchSettings::default(),
    }
}

/// Numbers agree to 1e-9 relative (rounding of merged versus one-pass
/// sums is near 1e-15; draw_share counts draws, which would differ by
/// 1/4000 only if a draw sat within rounding of a tie); everything else
/// is equal.
fn assert_close(a: &serde_json::Value, b: &serde_json::Value, path: &str) {
    crate::estimate::testing::assert_json_close(a, b, 1e-9, path);
}

fn board(c: &Computed, key: &str) -> serde_json::Value {
    let w = c.windows.iter().find(|w| w.key == key).expect("window");
    serde_json::to_value(w.board.as_ref().expect("scored")).expect("json")
}

#[test]
fn merged_cumulative_equals_a_from_scratch_pass() {
    let first = input(3000, None)
        .compute(RecomputeOptions::default())
        .expect("first fit");
    assert!(first.refit.is_some());
    let kept = first.nuisance.clone();
    assert!(kept.memo.cumulative.is_some());

    // Two more cohorts arrive; the fit is current, so nothing is refit.
    let second = input(5000, Some(kept.clone()))
        .compute(RecomputeOptions::default())
        .expect("incremental");
    assert!(second.refit.is_none());
    assert_eq!(second.newly_scored, 2000);
    let merged = second.nuisance.memo.cumulative.as_ref().expect("memo");
    assert_eq!(merged.units.len(), 5000);

    // The same recompute without the memo scores every window afresh.
    let mut cleared = kept;
    cleared.memo = Arc::default();
    let scratch = input(5000, Some(cleared))
        .compute(RecomputeOptions::default())
        .expect("scratch");
    let (merged_board, scratch_board) =
        (board(&second, "cumulative"), board(&scratch, "cumulative"));
    // The error bounds are on both (zero-effect, constant-effect and the
    // three models), and are compared with everything else below: the
    // 2,000 units scored after the fit keep their folds as units arrive.
    // So is the blend of the three models, its per-fold sums merged on the
    // one side and summed afresh on the other.
    for b in [&merged_board, &scratch_board] {
        let levels = b["levels"]["models"].as_array().expect("levels");
        assert_eq!(levels.len(), 5);
        assert!(levels.iter().all(|l| l["rmse_lower_bound"].is_number()));
        assert_eq!(b["blend"]["weights"].as_array().map(Vec::len), Some(3));
        assert_eq!(b["blend"]["fold_units"].as_array().map(Vec::len), Some(5));
    }
    assert_close(&merged_board, &scratch_board, "");
    // Any pair of the merged window answers from its co-moments, equal
    // to the board's own pairs and differences from constant-effect (the
    // same sums read the same way: 1e-12 relative).
    let memo = &second.nuisance.memo;
    let units = merged_board["n_units"].as_u64().expect("units");
    let near = |a: f64, b: &serde_json::Value| {
        let b = b.as_f64().expect("number");
        assert!((a - b).abs() <= 1e-12 * b.abs().max(1.0), "{a} vs {b}");
    };
    let pairs = merged_board["pairwise"].as_array().expect("pairs");
    assert!(!pairs.is_empty());
    for p in pairs {
        let (first, second) = (
            p["first"].as_str().expect("name"),
            p["second"].as_str().expect("name"),
        );
        let d = memo
            .cumulative_difference(units, first, second)
            .expect("a ranked pair");
        near(d.estimate, &p["estimate"]);
        near(d.se, &p["se"]);
    }
    for m in merged_board["models"].as_array().expect("models") {
        let d = memo
            .cumulative_difference(units, m["name"].as_str().expect("name"), "constant-effect")
            .expect("a ranked model");
        near(d.estimate, &m["vs_constant"]["estimate"]);
        near(d.se, &m["vs_constant"]["se"]);
    }
    // Not for a board of another size, nor a model it does not rank.
    assert!(memo
        .cumulative_difference(units - 1, "sharp", "noisy")
        .is_none());
    assert!(memo
        .cumulative_difference(units, "sharp", "absent")
        .is_none());
    for c in 0..5 {
        let key = format!("cohort:c{c}");
        assert_close(&board(&second, &key), &board(&scratch, &key), &key);
    }
    // Cohorts that did not change are the kept results, bit for bit.
    assert_eq!(board(&second, "cohort:c0"), board(&first, "cohort:c0"));
}

/// The board without the rank and calibration metrics (and the count of
/// units they cover) and the error bounds, which are refreshed with them.
fn without_rank_metrics(mut v: serde_json::Value) -> serde_json::Value {
    if let Some(o) = v.as_object_mut() {
        o.remove("rank_metrics_units");
        o.remove("levels");
        o.remove("blend");
    }
    for m in v["models"].as_array_mut().into_iter().flatten() {
        if let Some(o) = m.as_object_mut() {
            for key in ["autoc", "qini", "blp_slope", "calibration"] {
                o.remove(key);
            }
        }
    }
    v
}

fn rank_metrics_of(v: &serde_json::Value) -> Vec<serde_json::Value> {
    let mut models: Vec<serde_json::Value> = v["models"]
        .as_array()
        .expect("models")
        .iter()
        .map(|m| {
            serde_json::json!([
                m["name"],
                m["autoc"],
                m["qini"],
                m["blp_slope"],
                m["calibration"]
            ])
        })
        .collect();
    models.sort_by_key(|m| m[0].to_string());
    models
}

#[test]
fn cumulative_rank_metrics_wait_for_the_set_growth_and_the_rest_is_exact() {
    let at = |units: usize, nuisance: Option<NuisanceState>| {
        let mut f = input(units, nuisance);
        f.ranks_fresh_below = 0;
        f
    };
    let first = at(4000, None)
        .compute(RecomputeOptions::default())
        .expect("first fit");
    let scratch = |units: usize| {
        let mut cleared = first.nuisance.clone();
        cleared.memo = Arc::default();
        at(units, Some(cleared))
            .compute(RecomputeOptions::default())
            .expect("scratch")
    };

    // 100 new units are 2.5% of the 4,000 ranked: under the default 5%,
    // so the rank metrics are the first recompute's, and say so.
    let second = at(4100, Some(first.nuisance.clone()))
        .compute(RecomputeOptions::default())
        .expect("incremental");
    let (carried, fresh) = (
        board(&second, "cumulative"),
        board(&scratch(4100), "cumulative"),
    );
    assert_eq!(carried["n_units"], 4100);
    assert_eq!(carried["rank_metrics_units"], 4000);
    assert_eq!(fresh["rank_metrics_units"], 4100);
    assert_eq!(
        rank_metrics_of(&carried),
        rank_metrics_of(&board(&first, "cumulative"))
    );
    assert_ne!(rank_metrics_of(&carried), rank_metrics_of(&fresh));
    // The error bounds are carried with them, from the same 4,000 units.
    assert_eq!(carried["levels"], board(&first, "cumulative")["levels"]);
    assert_ne!(carried["levels"], fresh["levels"]);
    assert_eq!(carried["blend"], board(&first, "cumulative")["blend"]);
    // Everything else is the from-scratch figure.
    assert_close(
        &without_rank_metrics(carried),
        &without_rank_metrics(fresh),
        "",
    );

    // Asked for, a refresh needs no growth.
    let mut asked = at(4100, Some(second.nuisance.clone()));
    asked.nuisance.as_mut().expect("fit").memo = second.nuisance.memo.clone();
    let on_request = asked
        .compute(RecomputeOptions {
            refresh_ranks: true,
            ..RecomputeOptions::default()
        })
        .expect("asked");
    assert_close(
        &board(&on_request, "cumulative"),
        &board(&scratch(4100), "cumulative"),
        "",
    );

    // 200 more make 7.5% of the 4,000: the refresh brings every figure
    // to the from-scratch pass over 4,300 units.
    let third = at(4300, Some(second.nuisance.clone()))
        .compute(RecomputeOptions::default())
        .expect("refresh");
    let refreshed = board(&third, "cumulative");
    assert_eq!(refreshed["rank_metrics_units"], 4300);
    assert_close(&refreshed, &board(&scratch(4300), "cumulative"), "");
}

/// Every unit's nuisance values under a fit, bit for bit.
fn nuisance_values(state: &NuisanceState, units: usize) -> Vec<[u64; 3]> {
    (0..units)
        .map(|u| state.values[u].map(f64::to_bits))
        .collect()
}

#[test]
fn a_capped_fit_is_reproduced_from_its_record_whatever_the_setting_now() {
    let units = 3000;
    let mut capped = input(units, None);
    capped.max_fit_units = Some(1200);
    let first = capped
        .compute(RecomputeOptions::default())
        .expect("capped fit");
    assert!(first.refit.is_some());
    let fit = &first.nuisance;
    assert_eq!(fit.report.max_fit_units, Some(1200));
    assert_eq!((fit.report.fitted_units, fit.report.units), (1200, units));
    assert_eq!(fit.fit_units, units);
    assert!((0..units).all(|u| fit.values[u].iter().all(|v| v.is_finite())));

    // What the store keeps, and what a restart reads back from it.
    let record = serde_json::to_string(&fit.report).expect("report json");
    let recorded = recorded_max_fit_units(&record).expect("readable");
    assert_eq!(recorded, Some(1200));

    // Restarted with another setting: the record's cap draws the same fit.
    let mut restarted = input(units, None);
    restarted.max_fit_units = Some(2_000_000);
    let reproduced = restarted
        .reproduce_fit(fit.last_outcome_seq, recorded)
        .expect("reproduced");
    assert_eq!(reproduced.report.fitted_units, 1200);
    assert_eq!(
        nuisance_values(&reproduced, units),
        nuisance_values(fit, units)
    );
    assert_eq!(
        serde_json::to_value(&reproduced.report).expect("json"),
        serde_json::to_value(&fit.report).expect("json")
    );

    // A record from before the cap has no such field: it was fitted on
    // every unit, and is reproduced so (here that is not the capped fit).
    assert_eq!(recorded_max_fit_units(r#"{"folds":5,"seed":3}"#), Ok(None));
    let uncapped = restarted
        .reproduce_fit(fit.last_outcome_seq, None)
        .expect("uncapped");
    assert_eq!(uncapped.report.fitted_units, units);
    assert_ne!(
        nuisance_values(&uncapped, units),
        nuisance_values(fit, units)
    );
    // A cap above the units draws no sample and records none.
    let above = restarted
        .reproduce_fit(fit.last_outcome_seq, Some(2_000_000))
        .expect("above the units");
    assert_eq!(above.report.max_fit_units, None);
    assert_eq!(
        nuisance_values(&above, units),
        nuisance_values(&uncapped, units)
    );
    assert!(recorded_max_fit_units("not json").is_err());
}

/// With `limits.max_blend_models` below the number of ranked models, the
/// blend takes the first by rank, in registration order.
#[test]
fn the_blend_takes_the_leading_models_up_to_the_limit() {
    let mut capped = input(3000, None);
    capped.blend_models = 2;
    let computed = capped
        .compute(RecomputeOptions::default())
        .expect("first fit");
    let b = board(&computed, "cumulative");
    let mut leading: Vec<&str> = b["models"]
        .as_array()
        .expect("models")
        .iter()
        .filter(|m| m["baseline"] == false)
        .take(2)
        .map(|m| m["name"].as_str().expect("name"))
        .collect();
    let mut blended: Vec<&str> = b["blend"]["weights"]
        .as_array()
        .expect("blend")
        .iter()
        .map(|w| w["model"].as_str().expect("model"))
        .collect();
    leading.sort_unstable();
    blended.sort_unstable();
    assert_eq!(blended, leading);
}

/// Units sent without a cohort (cohort name "") are in the cumulative and
/// recent windows and in no cohort window: none that no request could name
/// is scored or stored.
#[test]
fn units_without_a_cohort_are_in_no_cohort_window() {
    let mut unlabelled = input(3000, None);
    unlabelled.cohort_names[0] = String::new();
    let computed = unlabelled
        .compute(RecomputeOptions::default())
        .expect("fit");
    let keys: Vec<&str> = computed.windows.iter().map(|w| w.key.as_str()).collect();
    assert_eq!(keys, ["cumulative", "recent", "cohort:c1", "cohort:c2"]);
    let cumulative = board(&computed, "cumulative");
    assert_eq!(cumulative["n_units"], 3000);
}
