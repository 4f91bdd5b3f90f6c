//! Property tests of the two places hostile bytes first meet the program:
//! the CSV reader (src/input.rs) and intake validation
//! (src/monitor/checks.rs). Case counts are kept small so the file runs in
//! seconds; every failure prints its shrunk input.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use plumbline::domain::{OutcomeRecord, PredictionRecord, StoredModel, UnitRecord};
use plumbline::estimate::OutcomeKind;
use plumbline::input::{read_predictions, read_units};
use plumbline::monitor::cache::DatasetCache;
use plumbline::monitor::checks::{
    check_outcomes, check_predictions, check_units, Fault, OutcomeIn, PredictionIn, UnitIn,
};
use proptest::prelude::*;

/// A file in a per-process temporary directory, removed on drop.
struct TempFile(PathBuf);

impl TempFile {
    fn with(bytes: &[u8]) -> Self {
        use std::sync::atomic::{AtomicUsize, Ordering};
        static NEXT: AtomicUsize = AtomicUsize::new(0);
        let dir = std::env::temp_dir().join(format!("plumbline-props-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("dir");
        let p = dir.join(format!("f{}.csv", NEXT.fetch_add(1, Ordering::Relaxed)));
        std::fs::write(&p, bytes).expect("write");
        TempFile(p)
    }
    fn path(&self) -> &Path {
        &self.0
    }
}

impl Drop for TempFile {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.0);
    }
}

/// A valid units file: ids, features, treatment, outcome, propensity.
#[derive(Debug, Clone)]
struct UnitsCsv {
    features: Vec<Vec<f64>>,
    treatment: Vec<u8>,
    outcome: Vec<f64>,
    propensity: Vec<f64>,
    d: usize,
}

impl UnitsCsv {
    fn header(&self) -> Vec<String> {
        let mut h = vec!["unit_id".to_string()];
        h.extend((0..self.d).map(|j| format!("x{j}")));
        h.extend(["treatment", "outcome", "propensity"].map(String::from));
        h
    }
    fn cells(&self) -> Vec<Vec<String>> {
        (0..self.outcome.len())
            .map(|i| {
                let mut r = vec![format!("id-{i}")];
                // `{:?}` prints the shortest text that parses back to the same double.
                r.extend(self.features[i].iter().map(|v| format!("{v:?}")));
                r.push(self.treatment[i].to_string());
                r.push(format!("{:?}", self.outcome[i]));
                r.push(format!("{:?}", self.propensity[i]));
                r
            })
            .collect()
    }
    fn render(header: &[String], cells: &[Vec<String>]) -> Vec<u8> {
        let mut s = header.join(",");
        s.push('\n');
        for r in cells {
            s.push_str(&r.join(","));
            s.push('\n');
        }
        s.into_bytes()
    }
}

fn finite() -> impl Strategy<Value = f64> {
    prop_oneof![
        -1e6..1e6f64,
        any::<f64>().prop_filter("finite", |v| v.is_finite()),
        Just(0.0),
        Just(-0.0),
    ]
}

fn units_csv() -> impl Strategy<Value = UnitsCsv> {
    (1usize..4, 1usize..12).prop_flat_map(|(d, n)| {
        (
            prop::collection::vec(prop::collection::vec(finite(), d), n),
            prop::collection::vec(0u8..2, n),
            prop::collection::vec(finite(), n),
            prop::collection::vec(0.001..0.999f64, n),
        )
            .prop_map(move |(features, treatment, outcome, propensity)| UnitsCsv {
                features,
                treatment,
                outcome,
                propensity,
                d,
            })
    })
}

/// Reads a file both ways; neither may panic, and every error names the file.
fn read_both(bytes: &[u8]) -> Result<(), TestCaseError> {
    let f = TempFile::with(bytes);
    for kind in [
        None,
        Some(OutcomeKind::Continuous),
        Some(OutcomeKind::Binary),
    ] {
        if let Err(e) = read_units(f.path(), kind) {
            prop_assert_eq!(&e.file, f.path());
            prop_assert!(e.to_string().starts_with(&f.path().display().to_string()));
        }
    }
    if let Err(e) = read_predictions(f.path()) {
        prop_assert_eq!(&e.file, f.path());
    }
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    /// Arbitrary bytes never panic the reader.
    #[test]
    fn arbitrary_bytes_never_panic(bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        read_both(&bytes)?;
    }

    /// Arbitrary bytes behind a valid header, where the parser goes deepest.
    #[test]
    fn arbitrary_rows_never_panic(tail in prop::collection::vec(
        prop_oneof![Just(b','), Just(b'\n'), Just(b'"'), Just(b'\r'), Just(b'1'), Just(b'.'), Just(b'e'), any::<u8>()],
        0..300,
    )) {
        let mut bytes = b"unit_id,x0,treatment,outcome\n".to_vec();
        bytes.extend(tail);
        read_both(&bytes)?;
    }

    /// Valid files with a byte replaced, inserted or deleted never panic.
    #[test]
    fn mutated_valid_files_never_panic(
        csv in units_csv(),
        edits in prop::collection::vec((any::<prop::sample::Index>(), 0u8..3, any::<u8>()), 1..4),
    ) {
        let mut bytes = UnitsCsv::render(&csv.header(), &csv.cells());
        for (at, op, b) in edits {
            let i = at.index(bytes.len().max(1)).min(bytes.len());
            match op {
                0 if i < bytes.len() => bytes[i] = b,
                1 => bytes.insert(i, b),
                _ if i < bytes.len() => { bytes.remove(i); }
                _ => {}
            }
        }
        read_both(&bytes)?;
    }

    /// A valid generated file reads back exactly, bit for bit.
    #[test]
    fn valid_files_round_trip(csv in units_csv()) {
        let f = TempFile::with(&UnitsCsv::render(&csv.header(), &csv.cells()));
        let u = read_units(f.path(), Some(OutcomeKind::Continuous))
            .map_err(|e| TestCaseError::fail(e.to_string()))?;
        let n = csv.outcome.len();
        prop_assert_eq!(u.ids, (0..n).map(|i| format!("id-{i}")).collect::<Vec<_>>());
        prop_assert_eq!(u.feature_names, (0..csv.d).map(|j| format!("x{j}")).collect::<Vec<_>>());
        let t = &u.table;
        for i in 0..n {
            for j in 0..csv.d {
                prop_assert_eq!(t.features()[[i, j]].to_bits(), csv.features[i][j].to_bits());
            }
            prop_assert_eq!(t.treatment()[i], f64::from(csv.treatment[i]));
            prop_assert_eq!(t.outcome()[i].to_bits(), csv.outcome[i].to_bits());
            prop_assert_eq!(
                t.logged_propensity().map(|p| p[i].to_bits()),
                Some(csv.propensity[i].to_bits())
            );
        }
    }

    /// One bad cell is reported at its data row (1-based) and its column.
    #[test]
    fn errors_name_row_and_column(
        csv in units_csv(),
        at in any::<prop::sample::Index>(),
        col in any::<prop::sample::Index>(),
        bad in prop_oneof![
            Just("abc".to_string()), Just(String::new()), Just("NaN".to_string()),
            Just("inf".to_string()), Just("1e999".to_string()), Just("0x1".to_string()),
        ],
    ) {
        let header = csv.header();
        let mut cells = csv.cells();
        let row = at.index(cells.len());
        // Any column but unit_id: features, treatment, outcome, propensity.
        let c = 1 + col.index(header.len() - 1);
        cells[row][c] = bad.clone();
        let f = TempFile::with(&UnitsCsv::render(&header, &cells));
        let e = read_units(f.path(), Some(OutcomeKind::Continuous))
            .err()
            .ok_or_else(|| TestCaseError::fail(format!("{bad:?} accepted")))?;
        prop_assert_eq!(e.row, Some(row + 1), "{}", e);
        prop_assert_eq!(e.column.as_deref(), Some(header[c].as_str()), "{}", e);
        prop_assert_eq!(&e.file, f.path());
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 128, ..ProptestConfig::default() })]

    /// A record with too many cells is reported at its data row, counted in
    /// records, even when earlier quoted ids span several lines.
    #[test]
    fn malformed_records_are_located_by_record(
        multiline in prop::collection::vec(any::<bool>(), 1..10),
        at in any::<prop::sample::Index>(),
    ) {
        let mut text = String::from("unit_id,x0,treatment,outcome\n");
        let bad = at.index(multiline.len());
        for (i, &m) in multiline.iter().enumerate() {
            let id = if m { format!("\"id\n{i}\"") } else { format!("id{i}") };
            let extra = if i == bad { ",9" } else { "" };
            text.push_str(&format!("{id},0.5,1,2.0{extra}\n"));
        }
        let f = TempFile::with(text.as_bytes());
        let e = read_units(f.path(), None)
            .err()
            .ok_or_else(|| TestCaseError::fail("accepted a ragged file"))?;
        prop_assert_eq!(e.row, Some(bad + 1), "{}", e);
    }

    /// Invalid UTF-8 in a cell names the row and the column.
    #[test]
    fn invalid_utf8_names_row_and_column(rows in 1usize..6, at in any::<prop::sample::Index>(), col in 0usize..4) {
        let header = ["unit_id", "x0", "treatment", "outcome"];
        let bad = at.index(rows);
        let mut bytes = format!("{}\n", header.join(",")).into_bytes();
        for i in 0..rows {
            let mut cells: Vec<Vec<u8>> = vec![format!("id{i}").into_bytes(), b"0.5".to_vec(), b"1".to_vec(), b"2.0".to_vec()];
            if i == bad {
                cells[col] = vec![b'1', 0xff, 0xfe];
            }
            bytes.extend(cells.join(&b','));
            bytes.push(b'\n');
        }
        let f = TempFile::with(&bytes);
        let e = read_units(f.path(), None)
            .err()
            .ok_or_else(|| TestCaseError::fail("accepted invalid UTF-8"))?;
        prop_assert_eq!(e.row, Some(bad + 1), "{}", e);
        prop_assert_eq!(e.column.as_deref(), Some(header[col]), "{}", e);
    }
}

// ------------------------------------------------------------ validation

const D: usize = 2;

/// A cache holding units k0..k19 (outcomes for k0..k9, unstamped), model m1
/// (active, predicted k10 and k11) and model m2 (retired).
fn cache() -> DatasetCache {
    let mut c = DatasetCache::new(D);
    for i in 0..20 {
        c.add_unit(&UnitRecord {
            seq: i,
            key: format!("k{i}"),
            features: vec![i as f64, 1.0],
            treatment: (i % 2) as u8,
            propensity: None,
            cohort: String::new(),
            assigned_at_ms: 0,
        });
    }
    for i in 0..10 {
        c.add_outcome(&OutcomeRecord {
            unit_seq: i,
            seq: i,
            value: 1.0,
            observed_at_ms: 0,
        });
    }
    for (id, name, retired) in [(1, "m1", 0), (2, "m2", 5)] {
        c.add_model(StoredModel {
            id,
            dataset_id: 1,
            name: name.into(),
            version: "1".into(),
            description: String::new(),
            registered_at_ms: 1,
            retired_at_ms: retired,
            blend: None,
        });
    }
    for u in [10, 11] {
        c.add_prediction(
            0,
            &PredictionRecord {
                model_id: 1,
                unit_seq: u,
                seq: u - 10,
                effect: 0.5,
                predicted_at_ms: 0,
                arm: 1,
            },
        );
    }
    c
}

/// What a generated row is: valid, or broken in one of five ways; each
/// validation property gives the five its own meaning in its match arms.
#[derive(Debug, Clone, Copy)]
enum Flaw {
    None,
    One,
    Two,
    Three,
    Four,
    Five,
}

fn flaw() -> impl Strategy<Value = Flaw> {
    prop_oneof![
        4 => Just(Flaw::None),
        1 => Just(Flaw::One),
        1 => Just(Flaw::Two),
        1 => Just(Flaw::Three),
        1 => Just(Flaw::Four),
        1 => Just(Flaw::Five),
    ]
}

/// Checks the refused rows are exactly the flawed ones, each with its field
/// and fault, or that a batch without flaws is accepted whole.
fn expect_exactly(
    result: Result<usize, Vec<plumbline::monitor::checks::Rejection>>,
    flawed: &BTreeMap<usize, (&'static str, Fault)>,
    rows: usize,
) -> Result<(), TestCaseError> {
    match result {
        Ok(new) => {
            prop_assert!(
                flawed.is_empty(),
                "accepted a batch with flaws {:?}",
                flawed
            );
            prop_assert_eq!(new, rows);
        }
        Err(rejections) => {
            let got: BTreeMap<usize, (String, Fault)> = rejections
                .iter()
                .map(|r| (r.row, (r.field.clone(), r.fault)))
                .collect();
            prop_assert_eq!(got.len(), rejections.len(), "one reason per row");
            let want: BTreeMap<usize, (String, Fault)> = flawed
                .iter()
                .map(|(&i, &(f, k))| (i, (f.to_string(), k)))
                .collect();
            prop_assert_eq!(got, want);
        }
    }
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 200, ..ProptestConfig::default() })]

    #[test]
    fn unit_validation_refuses_exactly_the_flawed_rows(flaws in prop::collection::vec(flaw(), 1..40)) {
        let c = cache();
        let mut flawed = BTreeMap::new();
        let rows: Vec<UnitIn> = flaws.iter().enumerate().map(|(i, f)| {
            let mut r = UnitIn {
                key: format!("new-{i}"),
                features: vec![0.5, -0.5],
                treatment: 1,
                propensity: Some(0.5),
                cohort: "c".into(),
                assigned_at_ms: 0,
                arm: String::new(),
            };
            let why = match f {
                Flaw::None => None,
                Flaw::One => { r.features[1] = f64::NAN; Some(("features[1]", Fault::Invalid)) }
                Flaw::Two => { r.features.push(1.0); Some(("features", Fault::Invalid)) }
                Flaw::Three => { r.treatment = 7; Some(("treatment", Fault::Invalid)) }
                Flaw::Four => { r.propensity = Some(1.0); Some(("propensity", Fault::Invalid)) }
                // A stored key with other values.
                Flaw::Five => { r.key = "k3".into(); Some(("key", Fault::Conflict)) }
            };
            if let Some(w) = why { flawed.insert(i, w); }
            r
        }).collect();
        let n = rows.len();
        expect_exactly(check_units(&c, &rows).map(|ok| ok.new_rows.len()), &flawed, n)?;
    }

    #[test]
    fn outcome_validation_refuses_exactly_the_flawed_rows(flaws in prop::collection::vec(flaw(), 1..10)) {
        let c = cache();
        let mut flawed = BTreeMap::new();
        let rows: Vec<OutcomeIn> = flaws.iter().enumerate().map(|(i, f)| {
            // Units k10..k19 have no outcome yet: one each.
            let mut r = OutcomeIn { unit_key: format!("k{}", 10 + i), value: 1.0, observed_at_ms: 0 };
            let why = match f {
                Flaw::None => None,
                Flaw::One => { r.value = f64::INFINITY; Some(("value", Fault::Invalid)) }
                Flaw::Two => { r.value = 0.5; Some(("value", Fault::Invalid)) }
                Flaw::Three => { r.unit_key = "nobody".into(); Some(("unit_key", Fault::Unknown)) }
                Flaw::Four => { r.observed_at_ms = -1; Some(("observed_at_ms", Fault::Invalid)) }
                // k0 already has outcome 1.0 (unstamped): another value conflicts.
                Flaw::Five => { r.unit_key = "k0".into(); r.value = 0.0; Some(("value", Fault::Conflict)) }
            };
            if let Some(w) = why { flawed.insert(i, w); }
            r
        }).collect();
        let n = rows.len();
        expect_exactly(
            check_outcomes(&c, OutcomeKind::Binary, &rows).map(|ok| ok.new_rows.len()),
            &flawed,
            n,
        )?;
    }

    #[test]
    fn prediction_validation_refuses_exactly_the_flawed_rows(flaws in prop::collection::vec(flaw(), 1..8)) {
        let c = cache();
        let mut flawed = BTreeMap::new();
        let rows: Vec<PredictionIn> = flaws.iter().enumerate().map(|(i, f)| {
            // Units k12..k19 have neither an outcome nor a prediction from m1.
            let mut r = PredictionIn { model: "m1".into(), unit_key: format!("k{}", 12 + i), effect: 0.1, predicted_at_ms: 0, arm: String::new() };
            let why = match f {
                Flaw::None => None,
                Flaw::One => { r.effect = f64::NAN; Some(("effect", Fault::Invalid)) }
                Flaw::Two => { r.model = "m2".into(); Some(("model", Fault::Order)) }
                Flaw::Three => { r.model = "ghost".into(); Some(("model", Fault::Unknown)) }
                // k0 has an outcome: the prediction could have seen it.
                Flaw::Four => { r.unit_key = "k0".into(); Some(("unit_key", Fault::Order)) }
                // m1 predicted 0.5 for k10 already.
                Flaw::Five => { r.unit_key = "k10".into(); Some(("effect", Fault::Conflict)) }
            };
            if let Some(w) = why { flawed.insert(i, w); }
            r
        }).collect();
        let n = rows.len();
        expect_exactly(check_predictions(&c, &rows).map(|ok| ok.new_rows.len()), &flawed, n)?;
    }
}
