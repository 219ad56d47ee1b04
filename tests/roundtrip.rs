//! Property tests of the round trips tarn relies on: `.npy` arrays of every element type,
//! shape and layout the codec reads; the worker protocol's messages (`task.json`, and a
//! worker's `out/result.json` with its arrays read back through tarn's validation); and
//! the store's records written in a batch and read back, also through a reopen.
//!
//! The `.npy` files of the other element types are written here the way NumPy writes
//! them (format 1.0 or 2.0, a header padded to a multiple of 64 bytes, C or Fortran
//! order), following the published format description (NEP 1, "A simple file format for
//! NumPy arrays"; status M, from memory). Values are drawn so that every element type
//! holds them exactly, so a round trip must give them back bit for bit.

use std::collections::BTreeMap;
use std::path::Path;

use proptest::prelude::*;
use tarn::protocol::npy::{decode, encode_f64, encode_i64, Array};
use tarn::protocol::{read_result, Expectation, ResultFile, ResultStatus, Role, TaskFile};
use tarn::store::{
    keys, Attempt, Batch, Estimate, EventRecord, Meta, RoundRecord, Sighting, StageTotals,
    StateRecord, StopDecision, Store, TaskRecord, TaskStatus, SCHEMA_VERSION,
};

/// The element types the codec reads, with their `descr`, size and how a value that
/// the type holds exactly is written.
#[derive(Debug, Clone, Copy)]
enum Elem {
    F8,
    F4,
    I8,
    I4,
    U1,
    B1,
}

impl Elem {
    fn descr(self) -> &'static str {
        match self {
            Elem::F8 => "<f8",
            Elem::F4 => "<f4",
            Elem::I8 => "<i8",
            Elem::I4 => "<i4",
            Elem::U1 => "|u1",
            Elem::B1 => "|b1",
        }
    }

    /// Little-endian bytes of `v`, which the type holds exactly.
    fn bytes(self, v: f64) -> Vec<u8> {
        match self {
            Elem::F8 => v.to_le_bytes().to_vec(),
            Elem::F4 => (v as f32).to_le_bytes().to_vec(),
            Elem::I8 => (v as i64).to_le_bytes().to_vec(),
            Elem::I4 => (v as i32).to_le_bytes().to_vec(),
            Elem::U1 | Elem::B1 => vec![v as u8],
        }
    }

    /// A strategy for values the type holds exactly.
    fn values(self) -> BoxedStrategy<f64> {
        match self {
            Elem::F8 => any::<f64>().prop_filter("not NaN", |v| !v.is_nan()).boxed(),
            Elem::F4 => any::<f32>()
                .prop_filter("not NaN", |v| !v.is_nan())
                .prop_map(f64::from)
                .boxed(),
            // int64 beyond 2^53 is not exact in f64; tarn's arrays are f64 in the end.
            Elem::I8 => (-(1i64 << 53)..=(1i64 << 53))
                .prop_map(|v| v as f64)
                .boxed(),
            Elem::I4 => any::<i32>().prop_map(f64::from).boxed(),
            Elem::U1 => any::<u8>().prop_map(f64::from).boxed(),
            Elem::B1 => any::<bool>().prop_map(|b| b as u8 as f64).boxed(),
        }
    }
}

fn any_elem() -> impl Strategy<Value = Elem> {
    prop_oneof![
        Just(Elem::F8),
        Just(Elem::F4),
        Just(Elem::I8),
        Just(Elem::I4),
        Just(Elem::U1),
        Just(Elem::B1),
    ]
}

/// The shape text NumPy writes: `()`, `(n,)`, `(a, b, ...)`.
fn shape_text(shape: &[usize]) -> String {
    match shape {
        [] => "()".into(),
        [n] => format!("({n},)"),
        _ => format!(
            "({})",
            shape
                .iter()
                .map(|n| n.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
}

/// Row-major index of a multi-index.
fn c_index(idx: &[usize], shape: &[usize]) -> usize {
    idx.iter().zip(shape).fold(0, |acc, (i, n)| acc * n + i)
}

/// Column-major order of a row-major buffer: the element at multi-index `idx` goes to
/// the position where the first axis varies fastest.
fn to_fortran(data: &[f64], shape: &[usize]) -> Vec<f64> {
    let mut out = Vec::with_capacity(data.len());
    let mut idx = vec![0usize; shape.len()];
    for _ in 0..data.len() {
        out.push(data[c_index(&idx, shape)]);
        for (i, n) in idx.iter_mut().zip(shape) {
            *i += 1;
            if *i < *n {
                break;
            }
            *i = 0;
        }
    }
    out
}

/// An `.npy` file as NumPy writes it.
fn numpy_bytes(elem: Elem, shape: &[usize], c_data: &[f64], fortran: bool, v2: bool) -> Vec<u8> {
    let order = if fortran { "True" } else { "False" };
    let mut header = format!(
        "{{'descr': '{}', 'fortran_order': {order}, 'shape': {}, }}",
        elem.descr(),
        shape_text(shape)
    );
    let prefix = if v2 { 12 } else { 10 };
    let unpadded = prefix + header.len() + 1;
    header.push_str(&" ".repeat((64 - unpadded % 64) % 64));
    header.push('\n');
    let mut out = b"\x93NUMPY".to_vec();
    if v2 {
        out.extend_from_slice(&[2, 0]);
        out.extend_from_slice(&(header.len() as u32).to_le_bytes());
    } else {
        out.extend_from_slice(&[1, 0]);
        out.extend_from_slice(&(header.len() as u16).to_le_bytes());
    }
    out.extend_from_slice(header.as_bytes());
    let body = if fortran && shape.len() > 1 {
        to_fortran(c_data, shape)
    } else {
        c_data.to_vec()
    };
    for v in body {
        out.extend_from_slice(&elem.bytes(v));
    }
    out
}

/// A shape of rank 0 to 4 with at most 64 elements, and values of the type.
fn shaped(elem: Elem) -> impl Strategy<Value = (Vec<usize>, Vec<f64>)> {
    proptest::collection::vec(0usize..5, 0..5).prop_flat_map(move |shape| {
        let n: usize = shape.iter().product();
        (Just(shape), proptest::collection::vec(elem.values(), n..=n))
    })
}

fn same_bits(a: &[f64], b: &[f64]) -> bool {
    a.len() == b.len() && a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    /// Every element type, rank, layout and format version NumPy writes decodes to the
    /// values written, in row-major order; re-encoding as float64 gives them back again.
    #[test]
    fn npy_files_of_every_supported_type_decode_to_what_was_written(
        (elem, (shape, data)) in any_elem().prop_flat_map(|e| (Just(e), shaped(e))),
        fortran in any::<bool>(),
        v2 in any::<bool>(),
    ) {
        let bytes = numpy_bytes(elem, &shape, &data, fortran, v2);
        let a = decode(&bytes).map_err(|e| TestCaseError::fail(format!("{elem:?} {shape:?}: {e}")))?;
        prop_assert_eq!(&a.shape, &shape);
        prop_assert!(same_bits(&a.data, &data), "{:?} {:?}: {:?} != {:?}", elem, shape, a.data, data);
        let again = decode(&encode_f64(&a)).unwrap();
        prop_assert_eq!(&again.shape, &shape);
        prop_assert!(same_bits(&again.data, &data));
    }

    /// float64 arrays round-trip through tarn's own encoder bit for bit, NaN payloads,
    /// infinities and negative zero included.
    #[test]
    fn float64_arrays_round_trip_bit_for_bit(
        (shape, bits) in proptest::collection::vec(0usize..5, 0..4).prop_flat_map(|shape| {
            let n: usize = shape.iter().product();
            (Just(shape), proptest::collection::vec(any::<u64>(), n..=n))
        })
    ) {
        let a = Array { shape, data: bits.iter().map(|b| f64::from_bits(*b)).collect() };
        let back = decode(&encode_f64(&a)).unwrap();
        prop_assert_eq!(&back.shape, &a.shape);
        prop_assert!(back.data.iter().map(|v| v.to_bits()).eq(bits.iter().copied()));
    }

    /// int64 labels round-trip through tarn's encoder (exactly, within 2^53).
    #[test]
    fn int64_labels_round_trip(labels in proptest::collection::vec(-(1i64 << 53)..=(1i64 << 53), 0..50)) {
        let back = decode(&encode_i64(&[labels.len()], &labels)).unwrap();
        prop_assert_eq!(back.shape, vec![labels.len()]);
        prop_assert!(back.data.iter().zip(&labels).all(|(x, l)| *x == *l as f64));
    }
}

/// Short printable names (keys of maps, stage names).
fn name() -> impl Strategy<Value = String> {
    "[a-z][a-z0-9_]{0,11}"
}

/// Any text, control characters and non-ASCII included.
fn text() -> impl Strategy<Value = String> {
    any::<String>().prop_map(|s| s.chars().take(40).collect())
}

fn role() -> impl Strategy<Value = Role> {
    prop_oneof![
        Just(Role::Explore),
        Just(Role::Dedup),
        Just(Role::Retrain),
        Just(Role::Evaluate)
    ]
}

/// Finite numbers of every magnitude (non-finite ones are refused by the protocol and
/// never stored).
fn finite() -> impl Strategy<Value = f64> {
    any::<f64>().prop_filter("finite", |v| v.is_finite())
}

fn json_value() -> impl Strategy<Value = serde_json::Value> {
    let leaf = prop_oneof![
        Just(serde_json::Value::Null),
        any::<bool>().prop_map(serde_json::Value::Bool),
        any::<i64>().prop_map(|v| serde_json::json!(v)),
        finite().prop_map(|v| serde_json::json!(v)),
        text().prop_map(serde_json::Value::String),
    ];
    leaf.prop_recursive(3, 24, 4, |inner| {
        prop_oneof![
            proptest::collection::vec(inner.clone(), 0..4).prop_map(serde_json::Value::Array),
            proptest::collection::btree_map(name(), inner, 0..4)
                .prop_map(|m| serde_json::Value::Object(m.into_iter().collect())),
        ]
    })
}

prop_compose! {
    fn task_file()(
        task_id in text(), campaign in text(), round in any::<u32>(), stage in name(),
        role in role(), kind in proptest::option::of(name()), walker in any::<u32>(),
        walkers in any::<u32>(), seed in any::<u64>(), kt in finite(), threads in any::<u32>(),
        system in json_value(), params in json_value(),
        inputs in proptest::collection::btree_map(name(), text(), 0..4),
        model in proptest::option::of(text()),
    ) -> TaskFile {
        TaskFile { protocol: 1, task_id, campaign, round, stage, role, kind, walker, walkers,
                   seed, kt, threads, system, params, inputs, model }
    }
}

prop_compose! {
    fn result_file()(
        ok in any::<bool>(), message in proptest::option::of(text()),
        outputs in proptest::collection::btree_map(name(), text(), 0..4),
        metrics in proptest::collection::btree_map(name(), proptest::option::of(finite()), 0..5),
        energy_evals in any::<u64>(), model in proptest::option::of(text()),
    ) -> ResultFile {
        let status = if ok { ResultStatus::Ok } else { ResultStatus::Failed };
        ResultFile { protocol: 1, status, message, outputs, metrics, energy_evals, model }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    /// `task.json` as tarn writes it reads back equal (as a worker written in Rust reads
    /// it), every float exactly.
    #[test]
    fn task_json_round_trips(t in task_file()) {
        let text = serde_json::to_string_pretty(&t).unwrap();
        let back: TaskFile = serde_json::from_str(&text).unwrap();
        prop_assert_eq!(back, t);
    }

    /// `result.json` as a worker writes it reads back equal.
    #[test]
    fn result_json_round_trips(r in result_file()) {
        let text = serde_json::to_string(&r).unwrap();
        let back: ResultFile = serde_json::from_str(&text).unwrap();
        prop_assert_eq!(back, r);
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    /// A worker's whole answer — `out/result.json` and the `.npy` arrays it names —
    /// comes back from tarn's validation (`read_result`) with the same arrays, metrics
    /// and energy evaluations.
    #[test]
    fn an_explore_result_with_its_arrays_round_trips_through_validation(
        n in 0usize..20, dim in 1usize..4, seed in any::<u64>(),
        metrics in proptest::collection::btree_map(name(), proptest::option::of(finite()), 0..4),
        energy_evals in any::<u64>(),
    ) {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir(dir.path().join("out")).unwrap();
        let value = |i: usize| f64::from_bits(seed.rotate_left(i as u32 % 64) ^ i as u64);
        let finite_value = |i: usize| {
            let v = value(i);
            if v.is_finite() { v } else { i as f64 }
        };
        let samples = Array::matrix(n, dim, (0..n * dim).map(finite_value).collect());
        let energies = Array::vector((0..n).map(|i| finite_value(i + 1000)).collect());
        std::fs::write(dir.path().join("out/samples.npy"), encode_f64(&samples)).unwrap();
        std::fs::write(dir.path().join("out/energies.npy"), encode_f64(&energies)).unwrap();
        let result = ResultFile {
            protocol: 1,
            status: ResultStatus::Ok,
            message: None,
            outputs: [("samples", "out/samples.npy"), ("energies", "out/energies.npy")]
                .into_iter()
                .map(|(k, v)| (k.to_string(), v.to_string()))
                .collect(),
            metrics: metrics.clone(),
            energy_evals,
            model: None,
        };
        std::fs::write(dir.path().join("out/result.json"), serde_json::to_vec(&result).unwrap()).unwrap();
        let want = Expectation { role: Role::Explore, dim, n_inputs: 0, n_known: 0 };
        let got = read_result(dir.path(), &want)
            .map_err(|e| TestCaseError::fail(e.to_string()))?;
        prop_assert_eq!(&got.arrays["samples"], &samples);
        prop_assert_eq!(&got.arrays["energies"], &energies);
        prop_assert_eq!(got.metrics, metrics);
        prop_assert_eq!(got.energy_evals, energy_evals);
        prop_assert_eq!(got.model, None);
    }
}

prop_compose! {
    fn attempt()(
        number in any::<u32>(), outcome in name(), exit_code in proptest::option::of(any::<i32>()),
        signal in proptest::option::of(any::<i32>()), error in proptest::option::of(text()),
        stdout_tail in text(), stderr_tail in text(), wall_seconds in finite(),
        cpu_seconds in finite(), energy_evals in any::<u64>(), host in text(), started_unix in finite(),
    ) -> Attempt {
        Attempt { number, outcome, exit_code, signal, error, stdout_tail, stderr_tail,
                  wall_seconds, cpu_seconds, energy_evals, host, started_unix }
    }
}

prop_compose! {
    fn task_record()(
        id in text(), round in any::<u32>(), stage in name(), stage_index in any::<u16>(),
        role in role(), kind in proptest::option::of(name()), walker in any::<u32>(),
        seed in any::<u64>(),
        status in prop_oneof![Just(TaskStatus::Pending), Just(TaskStatus::Failed), Just(TaskStatus::Done)],
        attempts in proptest::collection::vec(attempt(), 0..3),
        metrics in proptest::collection::btree_map(name(), proptest::option::of(finite()), 0..4),
        energy_evals in any::<u64>(),
        arrays in proptest::collection::btree_map(name(), proptest::collection::vec(0usize..1000, 0..3), 0..3),
        model_sha256 in proptest::option::of("[0-9a-f]{64}"),
    ) -> TaskRecord {
        TaskRecord { v: SCHEMA_VERSION, id, round, stage, stage_index, role, kind, walker, seed,
                     status, attempts, metrics, energy_evals, arrays, model_sha256 }
    }
}

prop_compose! {
    fn state_record()(
        id in any::<u32>(), energy in finite(), representative in proptest::collection::vec(finite(), 0..6),
        round in any::<u32>(), stage in name(), task in text(), walker in any::<u32>(),
        seed in any::<u64>(), sample_index in any::<u64>(), cost_to_find in any::<u64>(),
        sightings in proptest::collection::btree_map(any::<u32>(), any::<u64>(), 0..4),
        estimates in proptest::collection::vec(
            (any::<u32>(), finite(), proptest::option::of(finite()))
                .prop_map(|(round, free_energy, free_energy_err)| Estimate { round, free_energy, free_energy_err }),
            0..3),
    ) -> StateRecord {
        StateRecord { v: SCHEMA_VERSION, id, energy, representative,
                      found: Sighting { round, stage, task, walker, seed, sample_index, cost_to_find },
                      sightings, estimates }
    }
}

prop_compose! {
    fn round_record()(
        round in any::<u32>(),
        stages in proptest::collection::vec(
            (name(), any::<u32>(), any::<u64>(), any::<u64>(), finite(), finite(),
             proptest::collection::btree_map(name(), finite(), 0..3))
                .prop_map(|(name, tasks, samples, energy_evals, cpu_seconds, wall_seconds, metrics)|
                    StageTotals { name, tasks, samples, energy_evals, cpu_seconds, wall_seconds, metrics }),
            0..4),
        new_states in any::<u32>(), states_total in any::<u32>(), energy_evals in any::<u64>(),
        cumulative_energy_evals in any::<u64>(), cpu_seconds in finite(), wall_seconds in finite(),
        finished_unix in finite(),
        stop in proptest::option::of((name(), text()).prop_map(|(rule, reason)| StopDecision { rule, reason })),
        cv_bins in proptest::collection::vec(any::<u32>(), 0..6),
    ) -> RoundRecord {
        RoundRecord { v: SCHEMA_VERSION, round, stages, new_states, states_total, energy_evals,
                      cumulative_energy_evals, cpu_seconds, wall_seconds, finished_unix, stop, cv_bins }
    }
}

fn meta() -> Meta {
    Meta {
        v: SCHEMA_VERSION,
        campaign: "roundtrip".into(),
        created_unix: 0.0,
        tarn_version: "test".into(),
        base_dir: ".".into(),
    }
}

fn first_version() -> tarn::store::CampaignVersion {
    tarn::store::CampaignVersion {
        v: SCHEMA_VERSION,
        index: 0,
        hash: "0123456789abcdef".into(),
        text: "name = \"roundtrip\"".into(),
        path: "roundtrip.toml".into(),
        accepted_unix: 0.0,
    }
}

/// Writes the records in one batch, reads them back from the open store and from a
/// read-only reopen, and compares.
fn store_round_trip(
    dir: &Path,
    task: &TaskRecord,
    state: &StateRecord,
    round: &RoundRecord,
    array: &Array,
) -> Result<(), TestCaseError> {
    let task_key = keys::task(task.round, task.stage_index, task.walker);
    let blob_key = keys::task_suffix(task.round, task.stage_index, task.walker);
    {
        let s = Store::create(dir, &meta(), &first_version()).unwrap();
        let mut b = Batch::default();
        b.put(task_key.clone(), task);
        b.put(keys::state(state.id), state);
        b.put(keys::round(round.round), round);
        b.put_array(&blob_key, "samples", array);
        b.event("roundtrip", "written");
        s.apply(b).unwrap();
        prop_assert_eq!(s.get::<TaskRecord>(&task_key).unwrap(), Some(task.clone()));
    }
    let s = Store::open_read_only(dir).map_err(|e| TestCaseError::fail(e.to_string()))?;
    prop_assert_eq!(s.get::<TaskRecord>(&task_key).unwrap(), Some(task.clone()));
    prop_assert_eq!(s.states().unwrap(), vec![state.clone()]);
    prop_assert_eq!(s.rounds().unwrap(), vec![round.clone()]);
    let back = s.array(&blob_key, "samples").unwrap().unwrap();
    prop_assert_eq!(&back.shape, &array.shape);
    prop_assert!(same_bits(&back.data, &array.data));
    let events: Vec<EventRecord> = s.events().unwrap();
    prop_assert_eq!(events.last().map(|e| e.kind.as_str()), Some("roundtrip"));
    prop_assert_eq!(s.meta().unwrap(), meta());
    Ok(())
}

proptest! {
    // Each case creates a sled store and reopens it: a few dozen cases, not hundreds.
    #![proptest_config(ProptestConfig::with_cases(24))]

    /// Task, state and round records and a chunked array come back from the store
    /// exactly as written, also after the store is closed and reopened.
    #[test]
    fn store_records_round_trip_through_sled(
        task in task_record(), state in state_record(), round in round_record(),
        bits in proptest::collection::vec(any::<u64>(), 0..64),
    ) {
        let dir = tempfile::tempdir().unwrap();
        let array = Array::vector(bits.iter().map(|b| f64::from_bits(*b)).collect());
        store_round_trip(dir.path(), &task, &state, &round, &array)?;
    }
}

/// The record types that are not in the batch test above round-trip through JSON.
#[test]
fn every_record_type_has_a_json_round_trip() {
    let mut sightings = BTreeMap::new();
    sightings.insert(3, 7);
    let ev = EventRecord {
        v: SCHEMA_VERSION,
        seq: u64::MAX,
        unix: 1.5e9 + 0.123456789,
        kind: "task_done".into(),
        message: "r0001.walk.w000 \u{1F600} \"quoted\"".into(),
        pid: 1,
        host: "h".into(),
    };
    let back: EventRecord = serde_json::from_str(&serde_json::to_string(&ev).unwrap()).unwrap();
    assert_eq!(back, ev);
    let m = meta();
    let back: Meta = serde_json::from_str(&serde_json::to_string(&m).unwrap()).unwrap();
    assert_eq!(back, m);
}
