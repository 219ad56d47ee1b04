//! Campaign files: parsing, validation, and the checked domain type the engine runs.
//!
//! Owns: the campaign-file format (TOML), its defaults, and every message about a bad
//! campaign file. Must not touch: the store, processes, task directories.
//!
//! Parsing happens in two steps. Serde reads the text into loose `Raw*` structs that
//! refuse unknown keys; then [`Campaign::from_raw`] checks meanings (ranges, names,
//! kinds, shapes) and builds the domain type. Every error carries the key path and,
//! where the key exists in the file, its line, column and the line itself.

mod programs;
pub mod render;
pub mod templates;

use std::collections::BTreeSet;
use std::ops::Range;
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::Deserialize;
use sha2::{Digest, Sha256};

pub use render::SpecError;

use crate::protocol::{npy, Array, Role};

/// Built-in worker kinds, by the role they can fill.
pub const BUILTIN_KINDS: &[(Role, &str, &str)] = &[
    (
        Role::Explore,
        "hold",
        "keep the walker at its start (one sample); for tests and overhead benchmarks",
    ),
    (
        Role::Explore,
        "metropolis",
        "Metropolis Monte Carlo in configuration space",
    ),
    (
        Role::Explore,
        "langevin",
        "Langevin dynamics (BAOAB) at a temperature factor",
    ),
    (
        Role::Explore,
        "metadynamics",
        "well-tempered metadynamics along collective variables",
    ),
    (
        Role::Explore,
        "latent-metropolis",
        "Metropolis Monte Carlo in the flow's latent space",
    ),
    (
        Role::Explore,
        "generate",
        "independent samples drawn from the flow, with log weights",
    ),
    (
        Role::Dedup,
        "quench",
        "quench to the local minimum (FIRE) and match fingerprints",
    ),
    (
        Role::Retrain,
        "realnvp",
        "fit a RealNVP flow to the pooled samples and the energy",
    ),
    (
        Role::Retrain,
        "flow",
        "fit a flow of stacked coupling layers (params.flow.layers) to the samples and the energy",
    ),
    (
        Role::Evaluate,
        "reweight",
        "reweight flow samples: ESS, free energies with error bars",
    ),
    (
        Role::Evaluate,
        "mbar",
        "combine walkers at several temperatures by MBAR, reweight to kT",
    ),
    (
        Role::Evaluate,
        "reweight-bias",
        "reweight biased samples (metadynamics) by their log weights",
    ),
];

// ---------------------------------------------------------------------------------
// Raw (loose) form, as serde reads it.
// ---------------------------------------------------------------------------------

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCampaign {
    name: String,
    seed: u64,
    #[serde(rename = "kT")]
    kt: f64,
    system: toml::Table,
    start: RawStart,
    explore: Vec<RawStage>,
    dedup: RawStage,
    retrain: Option<RawStage>,
    evaluate: Option<RawStage>,
    #[serde(default)]
    stop: RawStop,
    #[serde(default)]
    executor: RawExecutor,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawStart {
    points: Option<Vec<Vec<f64>>>,
    file: Option<String>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawStage {
    name: Option<String>,
    kind: Option<String>,
    command: Option<Vec<String>>,
    walkers: Option<u32>,
    restart: Option<String>,
    timeout_seconds: Option<f64>,
    pool_limit: Option<u64>,
    #[serde(default)]
    params: toml::Table,
    /// Slurm resources of this stage's jobs (`[explore.slurm]`, `[dedup.slurm]`, ...).
    slurm: Option<RawSlurmResources>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawStop {
    max_rounds: Option<u32>,
    max_energy_evals: Option<u64>,
    max_wall_seconds: Option<f64>,
    expected_states: Option<u32>,
    quiet_rounds: Option<u32>,
    combine: Option<String>,
    stable_rounds: Option<u32>,
    stable_tolerance: Option<f64>,
    stable_max_error: Option<f64>,
    pooled_max_error: Option<f64>,
    min_ess_fraction: Option<f64>,
    coverage: Option<RawCoverage>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCoverage {
    cv: toml::Table,
    min: f64,
    max: f64,
    bins: u32,
    fraction: f64,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawExecutor {
    kind: Option<String>,
    max_parallel: Option<u32>,
    timeout_seconds: Option<f64>,
    threads_per_task: Option<u32>,
    keep_task_dirs: Option<String>,
    #[serde(default)]
    retry: RawRetry,
    slurm: Option<RawSlurmExecutor>,
}

/// `[executor.slurm]`: the resources every job asks for unless its stage says
/// otherwise, and how often tarn asks Slurm about its jobs.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSlurmExecutor {
    partition: Option<String>,
    time_limit: Option<String>,
    cpus: Option<u32>,
    memory: Option<String>,
    sbatch_args: Option<Vec<String>>,
    poll_max_seconds: Option<f64>,
}

/// A stage's `slurm` table: the same resources as `[executor.slurm]`, for its jobs.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSlurmResources {
    partition: Option<String>,
    time_limit: Option<String>,
    cpus: Option<u32>,
    memory: Option<String>,
    sbatch_args: Option<Vec<String>>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRetry {
    attempts: Option<u32>,
    backoff: Option<String>,
    initial_seconds: Option<f64>,
    max_seconds: Option<f64>,
    jitter: Option<f64>,
}

// ---------------------------------------------------------------------------------
// Domain form, checked.
// ---------------------------------------------------------------------------------

/// A checked campaign, ready to run.
#[derive(Debug, Clone)]
pub struct Campaign {
    pub name: String,
    pub seed: u64,
    pub kt: f64,
    pub system: System,
    /// Start configurations `[m, dim]`.
    pub start: Array,
    pub explore: Vec<Stage>,
    pub dedup: Stage,
    pub retrain: Option<Stage>,
    pub evaluate: Option<Stage>,
    pub stop: StopRules,
    pub executor: ExecutorSpec,
    /// The campaign file's text, exactly as read.
    pub source: String,
    /// SHA-256 of `source`, hex.
    pub source_hash: String,
    /// Directory that relative paths in the file are resolved against.
    pub base_dir: PathBuf,
}

/// The system definition: the `[system]` table, handed to workers unchanged.
#[derive(Debug, Clone)]
pub struct System {
    pub table: serde_json::Value,
    pub dim: usize,
    /// A short description for the plan, e.g. `muller-brown (dim 2)`.
    pub label: String,
}

/// How a stage's worker is started.
#[derive(Debug, Clone, PartialEq)]
pub enum Worker {
    /// `tarn work KIND`, re-invoked from this binary.
    Builtin(String),
    /// The user's own program, as an argument array (never through a shell).
    Command(Vec<String>),
}

impl Worker {
    /// The kind name for a built-in worker.
    pub fn kind(&self) -> Option<&str> {
        match self {
            Worker::Builtin(k) => Some(k),
            Worker::Command(_) => None,
        }
    }
}

/// Where an explore walker starts in rounds after the first.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Restart {
    /// From the catalogue's states, walker w at state w mod k (the default).
    States,
    /// From the walker's own last sample of the previous round.
    Last,
    /// From the campaign's start configurations every round.
    Start,
}

/// One stage of a round.
#[derive(Debug, Clone)]
pub struct Stage {
    pub name: String,
    pub role: Role,
    pub worker: Worker,
    pub walkers: u32,
    pub restart: Restart,
    pub timeout: Option<Duration>,
    /// Retrain only: the largest training set handed to the worker (most recent kept
    /// samples first).
    pub pool_limit: u64,
    pub params: serde_json::Value,
    /// Slurm resources this stage's jobs ask for instead of `[executor.slurm]`'s (only
    /// with `executor.kind = "slurm"`).
    pub slurm: Option<SlurmResources>,
}

/// Rules that end a campaign. Budgets (rounds, energy evaluations, wall time) end it
/// whenever one is spent; the goal rules (states, quiet rounds, coverage, stability,
/// pooled error, ESS) end it when any of them holds, or with `combine = "all"` when
/// all of them do.
#[derive(Debug, Clone, PartialEq)]
pub struct StopRules {
    pub max_rounds: u32,
    pub max_energy_evals: Option<u64>,
    pub max_wall_seconds: Option<f64>,
    pub expected_states: Option<u32>,
    pub quiet_rounds: Option<u32>,
    /// Goal rules must all hold (true) or any one (false).
    pub all: bool,
    pub stability: Option<Stability>,
    /// Every state's free energy, pooled over the rounds (inverse-variance mean with
    /// the Birge-ratio scale, from at least two rounds), has an error bar of at most
    /// this many kT.
    pub pooled_max_error: Option<f64>,
    pub min_ess_fraction: Option<f64>,
    pub coverage: Option<Coverage>,
}

/// Every state's free energy moved by less than `tolerance` kT over the last `rounds`
/// rounds, and its latest error bar is below `max_error` kT.
#[derive(Debug, Clone, PartialEq)]
pub struct Stability {
    pub rounds: u32,
    pub tolerance: f64,
    pub max_error: f64,
}

/// A fraction of the bins of a collective variable's range has been visited by the
/// explore samples.
#[derive(Debug, Clone, PartialEq)]
pub struct Coverage {
    pub cv: crate::physics::cv::CollectiveVariable,
    pub min: f64,
    pub max: f64,
    pub bins: u32,
    pub fraction: f64,
}

/// Delay growth between attempts of a failed task.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Backoff {
    Fixed,
    Exponential,
}

/// The retry policy: data, validated, turned into delays by [`RetryPolicy::delay`].
#[derive(Debug, Clone, PartialEq)]
pub struct RetryPolicy {
    /// Total attempts of a task, including the first.
    pub attempts: u32,
    pub backoff: Backoff,
    pub initial: Duration,
    pub max: Duration,
    /// Relative jitter in [0, 1): the delay is scaled by a seeded factor in [1-j, 1+j].
    pub jitter: f64,
}

impl RetryPolicy {
    /// The delay before attempt `next_attempt` (2 for the first retry), jittered by a
    /// factor drawn from `seed` so that the schedule is reproducible.
    pub fn delay(&self, next_attempt: u32, seed: u64) -> Duration {
        let n = next_attempt.saturating_sub(2);
        let base = match self.backoff {
            Backoff::Fixed => self.initial.as_secs_f64(),
            Backoff::Exponential => self.initial.as_secs_f64() * 2f64.powi(n.min(60) as i32),
        };
        let capped = base.min(self.max.as_secs_f64());
        let unit = (splitmix(seed ^ u64::from(next_attempt)) >> 11) as f64 / (1u64 << 53) as f64;
        let factor = 1.0 + self.jitter * (2.0 * unit - 1.0);
        Duration::from_secs_f64((capped * factor).max(0.0))
    }
}

fn splitmix(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Which task directories survive their task.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum KeepDirs {
    None,
    Failed,
    All,
}

/// How and where tasks run.
#[derive(Debug, Clone, PartialEq)]
pub struct ExecutorSpec {
    pub kind: String,
    pub max_parallel: u32,
    pub timeout: Duration,
    pub threads_per_task: u32,
    pub keep_task_dirs: KeepDirs,
    pub retry: RetryPolicy,
    /// Set when `kind = "slurm"`: the defaults of every job and the polling limit.
    pub slurm: Option<SlurmSpec>,
}

/// The Slurm executor's settings (`[executor.slurm]`).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct SlurmSpec {
    /// What a job asks for when its stage does not say.
    pub defaults: SlurmResources,
    /// The longest pause between two polls of the queue (the pause starts short and
    /// grows while nothing changes).
    pub poll_max: Duration,
}

/// What one Slurm job asks for. Unset fields are left to the cluster's defaults,
/// except the time limit, which falls back to the task's timeout, and the CPUs, which
/// fall back to `executor.threads_per_task`.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct SlurmResources {
    pub partition: Option<String>,
    /// In whole minutes (Slurm's unit).
    pub time_limit_minutes: Option<u64>,
    pub cpus: Option<u32>,
    /// As Slurm's `--mem` takes it: a number with an optional unit K, M, G or T.
    pub memory: Option<String>,
    /// Further `sbatch` arguments, passed as they are (never through a shell).
    pub sbatch_args: Vec<String>,
}

impl SlurmResources {
    /// This table's settings where set, `base`'s elsewhere; stage arguments come after
    /// the executor's, so that sbatch lets them override.
    pub fn over(&self, base: &SlurmResources) -> SlurmResources {
        SlurmResources {
            partition: self.partition.clone().or_else(|| base.partition.clone()),
            time_limit_minutes: self.time_limit_minutes.or(base.time_limit_minutes),
            cpus: self.cpus.or(base.cpus),
            memory: self.memory.clone().or_else(|| base.memory.clone()),
            sbatch_args: base
                .sbatch_args
                .iter()
                .chain(&self.sbatch_args)
                .cloned()
                .collect(),
        }
    }
}

impl Campaign {
    /// Every stage in run order: explore stages, dedup, retrain, evaluate.
    pub fn stages(&self) -> Vec<&Stage> {
        let mut v: Vec<&Stage> = self.explore.iter().collect();
        v.push(&self.dedup);
        v.extend(self.retrain.iter());
        v.extend(self.evaluate.iter());
        v
    }

    /// Reads and checks a campaign file.
    pub fn load(path: &Path) -> Result<Campaign, SpecError> {
        let shown = path.display().to_string();
        let source = std::fs::read_to_string(path).map_err(|e| {
            SpecError::whole_file(&shown, format!("cannot read the campaign file: {e}"))
        })?;
        let base = path
            .canonicalize()
            .ok()
            .and_then(|p| p.parent().map(Path::to_path_buf))
            .unwrap_or_else(|| PathBuf::from("."));
        Campaign::parse(&shown, &source, &base)
    }

    /// Parses and checks campaign text; `file` is only used in messages and `base_dir`
    /// resolves relative paths.
    pub fn parse(file: &str, source: &str, base_dir: &Path) -> Result<Campaign, SpecError> {
        let doc = toml_edit::ImDocument::parse(source.to_string())
            .map_err(|e| SpecError::at(file, source, "", e.span(), syntax_message(e.message())))?;
        let de = toml::Deserializer::new(source);
        let raw: RawCampaign = serde_path_to_error::deserialize(de).map_err(|e| {
            let path = tidy_path(e.path());
            let inner = e.into_inner();
            let span = inner.span().or_else(|| span_of(&doc, &path));
            SpecError::at(file, source, &path, span, serde_message(inner.message()))
        })?;
        let ctx = Ctx {
            file,
            source,
            doc: &doc,
        };
        Campaign::from_raw(raw, &ctx, source, base_dir)
    }

    fn from_raw(
        raw: RawCampaign,
        ctx: &Ctx,
        source: &str,
        base_dir: &Path,
    ) -> Result<Campaign, SpecError> {
        check_name(ctx, "name", &raw.name)?;
        if !(raw.kt.is_finite() && raw.kt > 0.0) {
            return Err(ctx.err(
                "kT",
                "must be a positive number (the temperature in the system's energy unit)",
            ));
        }
        let system = check_system(ctx, &raw.system, base_dir)?;
        let start = check_start(ctx, &raw.start, system.dim, base_dir)?;
        let mut names = BTreeSet::new();
        if raw.explore.is_empty() {
            return Err(ctx.err("explore", "at least one [[explore]] stage is required"));
        }
        let mut explore = Vec::new();
        for (i, st) in raw.explore.into_iter().enumerate() {
            let stage = check_stage(ctx, &format!("explore[{i}]"), Role::Explore, st, &mut names)?;
            explore.push(stage);
        }
        let dedup = check_stage(ctx, "dedup", Role::Dedup, raw.dedup, &mut names)?;
        let retrain = raw
            .retrain
            .map(|s| check_stage(ctx, "retrain", Role::Retrain, s, &mut names))
            .transpose()?;
        let evaluate = raw
            .evaluate
            .map(|s| check_stage(ctx, "evaluate", Role::Evaluate, s, &mut names))
            .transpose()?;
        for (i, st) in explore.iter().enumerate() {
            check_builtin_params(ctx, &format!("explore[{i}]"), st, &system, raw.kt)?;
        }
        check_builtin_params(ctx, "dedup", &dedup, &system, raw.kt)?;
        for (path, st) in [("retrain", &retrain), ("evaluate", &evaluate)] {
            if let Some(st) = st {
                check_builtin_params(ctx, path, st, &system, raw.kt)?;
            }
        }
        let stop = check_stop(ctx, raw.stop)?;
        if let Some(c) = &stop.coverage {
            let spec: crate::physics::models::SystemSpec =
                serde_json::from_value(system.table.clone()).expect("validated above");
            c.cv.validate(system.dim, spec.particle_dims())
                .map_err(|e| ctx.err("stop.coverage.cv", e.to_string()))?;
        }
        let executor = check_executor(ctx, raw.executor)?;
        if executor.slurm.is_none() {
            let paths = (0..explore.len()).map(|i| format!("explore[{i}]")).chain([
                "dedup".to_string(),
                "retrain".into(),
                "evaluate".into(),
            ]);
            let stages = explore
                .iter()
                .chain([&dedup])
                .map(Some)
                .chain([retrain.as_ref(), evaluate.as_ref()]);
            for (path, stage) in paths.zip(stages) {
                if stage.is_some_and(|s| s.slurm.is_some()) {
                    return Err(ctx.err(
                        &format!("{path}.slurm"),
                        "Slurm resources need executor.kind = \"slurm\"; set it, or remove this table",
                    ));
                }
            }
        }
        let uses_model = explore
            .iter()
            .any(|s| matches!(s.worker.kind(), Some("latent-metropolis" | "generate")));
        if uses_model && retrain.is_none() {
            return Err(ctx.err(
                "explore",
                "a latent-metropolis or generate stage needs a flow: add a [retrain] stage",
            ));
        }
        Ok(Campaign {
            name: raw.name,
            seed: raw.seed,
            kt: raw.kt,
            system,
            start,
            explore,
            dedup,
            retrain,
            evaluate,
            stop,
            executor,
            source: source.to_string(),
            source_hash: hash_text(source),
            base_dir: base_dir.to_path_buf(),
        })
    }
}

/// SHA-256 of a text, as lowercase hex.
pub fn hash_text(text: &str) -> String {
    hex::encode(Sha256::digest(text.as_bytes()))
}

/// SHA-256 of what a campaign file says about the science: the file's tables without
/// `[executor]` and the stages' `slurm` tables (which say where and how tasks run, not
/// what they compute), in a canonical form (sorted keys, no comments or layout). The
/// digest uses it, so that the same campaign run locally and through Slurm has the same
/// digest. `None` when the text is not TOML (a stored file always is).
pub fn science_hash(source: &str) -> Option<String> {
    let mut table: toml::Table = source.parse().ok()?;
    table.remove("executor");
    for key in ["explore", "dedup", "retrain", "evaluate"] {
        match table.get_mut(key) {
            Some(toml::Value::Table(t)) => {
                t.remove("slurm");
            }
            Some(toml::Value::Array(stages)) => {
                for s in stages.iter_mut().filter_map(toml::Value::as_table_mut) {
                    s.remove("slurm");
                }
            }
            _ => {}
        }
    }
    let canonical = serde_json::to_string(&toml_to_json(&table)).ok()?;
    Some(hash_text(&format!("tarn campaign science v1\0{canonical}")))
}

/// What validation needs to point at the file.
struct Ctx<'a> {
    file: &'a str,
    source: &'a str,
    doc: &'a toml_edit::ImDocument<String>,
}

impl Ctx<'_> {
    fn err(&self, path: &str, message: impl Into<String>) -> SpecError {
        SpecError::at(
            self.file,
            self.source,
            path,
            span_of(self.doc, path),
            message,
        )
    }
}

fn syntax_message(m: &str) -> String {
    let first = m.lines().next().unwrap_or(m).trim();
    format!("TOML syntax error: {first}")
}

fn serde_message(m: &str) -> String {
    with_suggestion(&name_empty_key(m.lines().next().unwrap_or(m).trim()))
}

/// Appends "did you mean `x`?" to serde's "unknown field `y`, expected ..." when one of
/// the expected keys is within a small edit distance of the unknown one (a third of its
/// length, at least 1).
fn with_suggestion(m: &str) -> String {
    let Some(unknown) = backticked_after(m, "unknown field `") else {
        return m.to_string();
    };
    let Some(expected) = m.find("expected").map(|i| &m[i..]) else {
        return m.to_string();
    };
    let limit = (unknown.chars().count() / 3).max(1);
    let best = backticked(expected)
        .into_iter()
        .map(|k| (strsim::levenshtein(unknown, k), k))
        .filter(|(d, _)| *d <= limit)
        .min_by_key(|(d, _)| *d);
    match best {
        Some((_, k)) => format!("{m}; did you mean `{k}`?"),
        None => m.to_string(),
    }
}

/// The text between the backticks that follow `prefix`'s first occurrence.
fn backticked_after<'a>(m: &'a str, prefix: &str) -> Option<&'a str> {
    let rest = &m[m.find(prefix)? + prefix.len()..];
    Some(&rest[..rest.find('`')?])
}

/// Every backticked word of `m`, in order.
fn backticked(m: &str) -> Vec<&str> {
    m.split('`').skip(1).step_by(2).collect()
}

/// The key of a stage's `params` that a kind's error message is about: the unknown
/// field, the invalid parameter, or the leading `key:` of a type error, when `params`
/// has that key.
fn params_key_of<'a>(message: &'a str, params: &serde_json::Value) -> Option<&'a str> {
    let head = || {
        let head = message.split(": ").next()?;
        head.split(['.', '[']).next()
    };
    [
        backticked_after(message, "unknown field `"),
        backticked_after(message, "invalid parameter `"),
        head(),
    ]
    .into_iter()
    .flatten()
    .find(|key| params.get(*key).is_some())
}

/// serde names an unknown empty key (`"" = 1`) as "unknown field ``", which reads as a
/// garbled message; say what it is.
fn name_empty_key(m: &str) -> String {
    m.replace("unknown field ``", "unknown field `\"\"` (an empty key)")
}

/// The key path of a deserialization error as `explore[0].params`, the root as the
/// empty string. An empty key is written `""`, as TOML writes it, so that the path
/// of `"" = 1` in a stage reads `explore[0].""` rather than ending in a bare dot.
fn tidy_path(p: &serde_path_to_error::Path) -> String {
    use serde_path_to_error::Segment;
    let mut out = String::new();
    for seg in p.iter() {
        let key = match seg {
            Segment::Seq { index } => {
                out.push_str(&format!("[{index}]"));
                continue;
            }
            Segment::Map { key } | Segment::Enum { variant: key } => key.as_str(),
            Segment::Unknown => "?",
        };
        if !out.is_empty() {
            out.push('.');
        }
        out.push_str(if key.is_empty() { "\"\"" } else { key });
    }
    out
}

/// Finds the span of the value at a key path such as `explore[1].walkers`; falls back to
/// the nearest existing parent.
fn span_of(doc: &toml_edit::ImDocument<String>, path: &str) -> Option<Range<usize>> {
    let mut item: &toml_edit::Item = doc.as_item();
    let mut best = None;
    for seg in path_segments(path) {
        let next = match seg {
            Seg::Key(k) => item.get(k),
            Seg::Index(i) => item.get(i),
        };
        match next {
            Some(n) => {
                item = n;
                if let Some(s) = item_span(item) {
                    best = Some(s);
                }
            }
            None => break,
        }
    }
    best
}

/// The span of `key`'s name in the table at `table_path`.
fn key_span(
    doc: &toml_edit::ImDocument<String>,
    table_path: &str,
    key: &str,
) -> Option<Range<usize>> {
    let mut item: &toml_edit::Item = doc.as_item();
    for seg in path_segments(table_path) {
        item = match seg {
            Seg::Key(k) => item.get(k)?,
            Seg::Index(i) => item.get(i)?,
        };
    }
    let (k, _) = item.as_table_like()?.get_key_value(key)?;
    k.span()
}

fn item_span(item: &toml_edit::Item) -> Option<Range<usize>> {
    match item {
        toml_edit::Item::Value(v) => v.span(),
        toml_edit::Item::Table(t) => t.span(),
        toml_edit::Item::ArrayOfTables(a) => a.span(),
        toml_edit::Item::None => None,
    }
}

enum Seg<'a> {
    Key(&'a str),
    Index(usize),
}

fn path_segments(path: &str) -> Vec<Seg<'_>> {
    let mut out = Vec::new();
    for part in path.split('.').filter(|p| !p.is_empty()) {
        let (key, rest) = part
            .split_once('[')
            .map(|(k, r)| (k, Some(r)))
            .unwrap_or((part, None));
        if !key.is_empty() {
            out.push(Seg::Key(key));
        }
        if let Some(rest) = rest {
            for idx in rest.split('[') {
                if let Ok(i) = idx.trim_end_matches(']').parse() {
                    out.push(Seg::Index(i));
                }
            }
        }
    }
    out
}

fn check_name(ctx: &Ctx, path: &str, name: &str) -> Result<(), SpecError> {
    let ok = !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
        && name
            .chars()
            .next()
            .is_some_and(|c| c.is_ascii_alphanumeric());
    if ok {
        Ok(())
    } else {
        Err(ctx.err(
            path,
            format!("'{name}' is not a valid name: use 1 to 64 letters, digits, '-' or '_', starting with a letter or digit"),
        ))
    }
}

fn check_system(ctx: &Ctx, table: &toml::Table, base: &Path) -> Result<System, SpecError> {
    let mut json = toml_to_json(table);
    // An external model's program runs in each task's directory: resolve its relative
    // paths against the campaign file's directory, as for stage commands.
    if let Some(cmd) = json.get_mut("command").and_then(|c| c.as_array_mut()) {
        let args: Vec<String> = cmd
            .iter()
            .filter_map(|v| v.as_str().map(String::from))
            .collect();
        if args.len() == cmd.len() && !args.is_empty() {
            let (p, rest) =
                crate::engine::resolve_command(&Worker::Command(args), Path::new(""), base);
            let mut resolved = vec![serde_json::Value::String(p.display().to_string())];
            resolved.extend(rest.into_iter().map(serde_json::Value::String));
            *cmd = resolved;
        }
    }
    let spec: crate::physics::models::SystemSpec =
        serde_json::from_value(json.clone()).map_err(|e| ctx.err("system", format!("{e}")))?;
    spec.validate()
        .map_err(|e| ctx.err("system", e.to_string()))?;
    let dim = spec.dim();
    let model = table.get("model").and_then(|v| v.as_str()).unwrap_or("?");
    Ok(System {
        table: json,
        dim,
        label: format!("{model} (dim {dim})"),
    })
}

fn check_start(ctx: &Ctx, start: &RawStart, dim: usize, base: &Path) -> Result<Array, SpecError> {
    match (&start.points, &start.file) {
        (Some(_), Some(_)) => Err(ctx.err("start", "give either 'points' or 'file', not both")),
        (None, None) => Err(ctx.err(
            "start",
            "give the start configurations as 'points' or as a .npy 'file'",
        )),
        (Some(points), None) => {
            if points.is_empty() {
                return Err(ctx.err("start.points", "needs at least one configuration"));
            }
            let mut data = Vec::with_capacity(points.len() * dim);
            for (i, p) in points.iter().enumerate() {
                if p.len() != dim {
                    return Err(ctx.err(
                        &format!("start.points[{i}]"),
                        format!(
                            "has {} coordinates, but the system has dimension {dim}",
                            p.len()
                        ),
                    ));
                }
                if p.iter().any(|v| !v.is_finite()) {
                    return Err(ctx.err(&format!("start.points[{i}]"), "holds a non-finite value"));
                }
                data.extend_from_slice(p);
            }
            Ok(Array::matrix(points.len(), dim, data))
        }
        (None, Some(file)) => {
            let path = base.join(file);
            let a = npy::read_file(&path, crate::protocol::MAX_ARRAY_BYTES)
                .map_err(|m| ctx.err("start.file", format!("{}: {m}", path.display())))?;
            let a = if a.shape.len() == 1 && a.shape[0] == dim {
                Array::matrix(1, dim, a.data)
            } else {
                a
            };
            if a.shape.len() != 2 || a.shape[1] != dim || a.shape[0] == 0 {
                return Err(ctx.err(
                    "start.file",
                    format!(
                        "{}: array has shape {:?}, expected [m, {dim}] with m >= 1",
                        path.display(),
                        a.shape
                    ),
                ));
            }
            if a.data.iter().any(|v| !v.is_finite()) {
                return Err(ctx.err(
                    "start.file",
                    format!("{}: holds a non-finite value", path.display()),
                ));
            }
            Ok(a)
        }
    }
}

fn check_stage(
    ctx: &Ctx,
    path: &str,
    role: Role,
    raw: RawStage,
    names: &mut BTreeSet<String>,
) -> Result<Stage, SpecError> {
    let name = raw
        .name
        .clone()
        .unwrap_or_else(|| role.as_str().to_string());
    check_name(ctx, &format!("{path}.name"), &name)?;
    if !names.insert(name.clone()) {
        let how = if raw.name.is_none() {
            " (this stage's default name)"
        } else {
            ""
        };
        return Err(ctx.err(
            &format!("{path}.name"),
            format!("stage name '{name}'{how} is used twice; give each stage its own name"),
        ));
    }
    let worker = match (raw.kind, raw.command) {
        (Some(_), Some(_)) => {
            return Err(ctx.err(
                path,
                "give either 'kind' (a built-in worker) or 'command' (your own), not both",
            ))
        }
        (None, None) => {
            return Err(ctx.err(
                path,
                format!(
                    "needs 'kind' (a built-in worker: {}) or 'command' (an argument array)",
                    kinds_of(role).join(", ")
                ),
            ))
        }
        (Some(kind), None) => {
            if !kinds_of(role).contains(&kind.as_str()) {
                return Err(ctx.err(
                    &format!("{path}.kind"),
                    format!(
                        "'{kind}' is not a built-in {role} kind (choose one of: {})",
                        kinds_of(role).join(", ")
                    ),
                ));
            }
            Worker::Builtin(kind)
        }
        (None, Some(cmd)) => {
            if cmd.is_empty() || cmd[0].is_empty() {
                return Err(ctx.err(
                    &format!("{path}.command"),
                    "must name a program: [\"program\", \"arg\", ...]",
                ));
            }
            Worker::Command(cmd)
        }
    };
    let walkers = match (role, raw.walkers) {
        (Role::Explore, None) => 1,
        (Role::Explore, Some(0)) => {
            return Err(ctx.err(&format!("{path}.walkers"), "must be at least 1"))
        }
        (Role::Explore, Some(w)) if w > 10_000 => {
            return Err(ctx.err(&format!("{path}.walkers"), "must be at most 10000"))
        }
        (Role::Explore, Some(w)) => w,
        (_, None) => 1,
        (_, Some(_)) => {
            return Err(ctx.err(
                &format!("{path}.walkers"),
                format!("only explore stages have walkers; a {role} stage runs as one task"),
            ))
        }
    };
    let restart = match (role, raw.restart.as_deref()) {
        (Role::Explore, None | Some("states")) => Restart::States,
        (Role::Explore, Some("last")) => Restart::Last,
        (Role::Explore, Some("start")) => Restart::Start,
        (Role::Explore, Some(other)) => {
            return Err(ctx.err(
                &format!("{path}.restart"),
                format!("'{other}' is not one of: states, last, start"),
            ))
        }
        (_, None) => Restart::Start,
        (_, Some(_)) => {
            return Err(ctx.err(
                &format!("{path}.restart"),
                "only explore stages have a restart rule",
            ))
        }
    };
    let pool_limit = match (role, raw.pool_limit) {
        (Role::Retrain, None) => 50_000,
        (Role::Retrain, Some(0)) => {
            return Err(ctx.err(&format!("{path}.pool_limit"), "must be at least 1"))
        }
        (Role::Retrain, Some(n)) => n,
        (_, None) => 0,
        (_, Some(_)) => {
            return Err(ctx.err(
                &format!("{path}.pool_limit"),
                "only the retrain stage has a pool_limit",
            ))
        }
    };
    let timeout = raw
        .timeout_seconds
        .map(|t| positive_seconds(ctx, &format!("{path}.timeout_seconds"), t))
        .transpose()?;
    let slurm = raw
        .slurm
        .map(|r| {
            check_slurm_resources(
                ctx,
                &format!("{path}.slurm"),
                RawSlurmExecutor {
                    partition: r.partition,
                    time_limit: r.time_limit,
                    cpus: r.cpus,
                    memory: r.memory,
                    sbatch_args: r.sbatch_args,
                    poll_max_seconds: None,
                },
            )
        })
        .transpose()?;
    Ok(Stage {
        name,
        role,
        worker,
        walkers,
        restart,
        timeout,
        pool_limit,
        params: toml_to_json(&raw.params),
        slurm,
    })
}

/// A built-in stage's `params`, checked by the kind itself.
fn check_builtin_params(
    ctx: &Ctx,
    path: &str,
    stage: &Stage,
    system: &System,
    kt: f64,
) -> Result<(), SpecError> {
    let Worker::Builtin(kind) = &stage.worker else {
        return Ok(());
    };
    let spec: crate::physics::models::SystemSpec =
        serde_json::from_value(system.table.clone()).expect("validated system");
    crate::workers::check_params(kind, &stage.params, &spec, system.dim, kt).map_err(|e| {
        // Point at the key's own line when the message names a key of the table.
        let table = format!("{path}.params");
        let message = format!("{kind}: {}", with_suggestion(&name_empty_key(&e)));
        let Some(key) = params_key_of(&e, &stage.params) else {
            return ctx.err(&table, message);
        };
        let key_path = format!("{table}.{}", toml_key(key));
        // A message that starts with a deeper path (`flow.layers[1]: ...`) points at
        // that entry; an unknown key is pointed at by its name, a bad value by the value.
        let deeper = e
            .split(": ")
            .next()
            .filter(|head| head.len() > key.len() && head.starts_with(key))
            .and_then(|head| span_of(ctx.doc, &format!("{table}.{head}")));
        let span = if deeper.is_some() {
            deeper
        } else if e.starts_with("unknown field") {
            key_span(ctx.doc, &table, key)
        } else {
            span_of(ctx.doc, &key_path)
        };
        SpecError::at(ctx.file, ctx.source, &key_path, span, message)
    })
}

/// A key as a segment of a key path: bare when TOML allows it bare, else quoted.
fn toml_key(key: &str) -> String {
    let bare = !key.is_empty()
        && key
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-');
    if bare {
        key.to_string()
    } else {
        format!("{key:?}")
    }
}

/// The built-in kinds that can fill `role`.
pub fn kinds_of(role: Role) -> Vec<&'static str> {
    BUILTIN_KINDS
        .iter()
        .filter(|(r, _, _)| *r == role)
        .map(|(_, k, _)| *k)
        .collect()
}

fn positive_seconds(ctx: &Ctx, path: &str, t: f64) -> Result<Duration, SpecError> {
    if t.is_finite() && t > 0.0 && t < 1e9 {
        Ok(Duration::from_secs_f64(t))
    } else {
        Err(ctx.err(path, "must be a positive number of seconds"))
    }
}

fn check_stop(ctx: &Ctx, raw: RawStop) -> Result<StopRules, SpecError> {
    let max_rounds = raw.max_rounds.unwrap_or(10);
    if max_rounds == 0 {
        return Err(ctx.err("stop.max_rounds", "must be at least 1"));
    }
    if max_rounds > 1_000_000 {
        return Err(ctx.err("stop.max_rounds", "must be at most 1000000"));
    }
    if let Some(t) = raw.max_wall_seconds {
        positive_seconds(ctx, "stop.max_wall_seconds", t)?;
    }
    if raw.expected_states == Some(0) {
        return Err(ctx.err("stop.expected_states", "must be at least 1"));
    }
    if raw.quiet_rounds == Some(0) {
        return Err(ctx.err("stop.quiet_rounds", "must be at least 1"));
    }
    let all = match raw.combine.as_deref() {
        None | Some("any") => false,
        Some("all") => true,
        Some(o) => return Err(ctx.err("stop.combine", format!("'{o}' is not one of: any, all"))),
    };
    let stability = match raw.stable_rounds {
        None => {
            for key in ["stable_tolerance", "stable_max_error"] {
                let set = if key == "stable_tolerance" {
                    raw.stable_tolerance.is_some()
                } else {
                    raw.stable_max_error.is_some()
                };
                if set {
                    return Err(ctx.err(&format!("stop.{key}"), "needs stop.stable_rounds (the number of rounds the estimates must hold still)"));
                }
            }
            None
        }
        Some(0) => return Err(ctx.err("stop.stable_rounds", "must be at least 1")),
        Some(k) => {
            let tolerance = raw.stable_tolerance.unwrap_or(0.1);
            let max_error = raw.stable_max_error.unwrap_or(0.1);
            if !(tolerance.is_finite() && tolerance > 0.0) {
                return Err(ctx.err("stop.stable_tolerance", "must be a positive number of kT"));
            }
            if !(max_error.is_finite() && max_error > 0.0) {
                return Err(ctx.err("stop.stable_max_error", "must be a positive number of kT"));
            }
            Some(Stability {
                rounds: k,
                tolerance,
                max_error,
            })
        }
    };
    if let Some(e) = raw.pooled_max_error {
        if !(e.is_finite() && e > 0.0) {
            return Err(ctx.err("stop.pooled_max_error", "must be a positive number of kT"));
        }
    }
    if let Some(f) = raw.min_ess_fraction {
        if !(f > 0.0 && f <= 1.0) {
            return Err(ctx.err("stop.min_ess_fraction", "must be in (0, 1]"));
        }
    }
    let coverage = match raw.coverage {
        None => None,
        Some(c) => {
            let cv: crate::physics::cv::CollectiveVariable =
                serde_json::from_value(toml_to_json(&c.cv))
                    .map_err(|e| ctx.err("stop.coverage.cv", e.to_string()))?;
            if !(c.min.is_finite() && c.max.is_finite() && c.min < c.max) {
                return Err(ctx.err(
                    "stop.coverage.max",
                    "the range needs min < max, both finite",
                ));
            }
            if c.bins == 0 || c.bins > 1_000_000 {
                return Err(ctx.err("stop.coverage.bins", "must be between 1 and 1000000"));
            }
            if !(c.fraction > 0.0 && c.fraction <= 1.0) {
                return Err(ctx.err("stop.coverage.fraction", "must be in (0, 1]"));
            }
            Some(Coverage {
                cv,
                min: c.min,
                max: c.max,
                bins: c.bins,
                fraction: c.fraction,
            })
        }
    };
    Ok(StopRules {
        max_rounds,
        max_energy_evals: raw.max_energy_evals,
        max_wall_seconds: raw.max_wall_seconds,
        expected_states: raw.expected_states,
        quiet_rounds: raw.quiet_rounds,
        all,
        stability,
        pooled_max_error: raw.pooled_max_error,
        min_ess_fraction: raw.min_ess_fraction,
        coverage,
    })
}

fn check_executor(ctx: &Ctx, raw: RawExecutor) -> Result<ExecutorSpec, SpecError> {
    let kind = raw.kind.unwrap_or_else(|| "local".into());
    let slurm = match (kind.as_str(), raw.slurm) {
        ("local", None) => None,
        ("local", Some(_)) => {
            return Err(ctx.err(
                "executor.slurm",
                "is set but executor.kind is 'local': set kind = \"slurm\" to run tasks as Slurm jobs, or remove this table",
            ))
        }
        ("slurm", raw) => Some(check_slurm_executor(ctx, raw.unwrap_or_default())?),
        _ => {
            return Err(ctx.err(
                "executor.kind",
                format!("'{kind}' is not an executor this build knows (choose: local, slurm)"),
            ))
        }
    };
    let max_parallel = raw.max_parallel.unwrap_or(2);
    if max_parallel == 0 || max_parallel > 1024 {
        return Err(ctx.err("executor.max_parallel", "must be between 1 and 1024"));
    }
    let timeout = positive_seconds(
        ctx,
        "executor.timeout_seconds",
        raw.timeout_seconds.unwrap_or(3600.0),
    )?;
    let threads_per_task = raw.threads_per_task.unwrap_or(1);
    if threads_per_task == 0 || threads_per_task > 256 {
        return Err(ctx.err("executor.threads_per_task", "must be between 1 and 256"));
    }
    let keep_task_dirs = match raw.keep_task_dirs.as_deref() {
        None | Some("failed") => KeepDirs::Failed,
        Some("none") => KeepDirs::None,
        Some("all") => KeepDirs::All,
        Some(o) => {
            return Err(ctx.err(
                "executor.keep_task_dirs",
                format!("'{o}' is not one of: none, failed, all"),
            ))
        }
    };
    let r = raw.retry;
    let attempts = r.attempts.unwrap_or(3);
    if attempts == 0 || attempts > 100 {
        return Err(ctx.err(
            "executor.retry.attempts",
            "must be between 1 and 100 (the first attempt counts)",
        ));
    }
    let backoff = match r.backoff.as_deref() {
        None | Some("exponential") => Backoff::Exponential,
        Some("fixed") => Backoff::Fixed,
        Some(o) => {
            return Err(ctx.err(
                "executor.retry.backoff",
                format!("'{o}' is not one of: exponential, fixed"),
            ))
        }
    };
    let initial = r.initial_seconds.unwrap_or(1.0);
    if !(initial.is_finite() && (0.0..1e6).contains(&initial)) {
        return Err(ctx.err(
            "executor.retry.initial_seconds",
            "must be a number of seconds, 0 or more",
        ));
    }
    let max = r.max_seconds.unwrap_or(60.0);
    if !(max.is_finite() && max >= initial && max < 1e7) {
        return Err(ctx.err(
            "executor.retry.max_seconds",
            "must be at least initial_seconds",
        ));
    }
    let jitter = r.jitter.unwrap_or(0.1);
    if !(0.0..1.0).contains(&jitter) {
        return Err(ctx.err("executor.retry.jitter", "must be in [0, 1)"));
    }
    Ok(ExecutorSpec {
        kind,
        max_parallel,
        timeout,
        threads_per_task,
        keep_task_dirs,
        retry: RetryPolicy {
            attempts,
            backoff,
            initial: Duration::from_secs_f64(initial),
            max: Duration::from_secs_f64(max),
            jitter,
        },
        slurm,
    })
}

/// `[executor.slurm]`: the job defaults and the polling limit.
fn check_slurm_executor(ctx: &Ctx, raw: RawSlurmExecutor) -> Result<SlurmSpec, SpecError> {
    let poll = raw.poll_max_seconds.unwrap_or(10.0);
    if !(poll.is_finite() && (0.1..=600.0).contains(&poll)) {
        return Err(ctx.err(
            "executor.slurm.poll_max_seconds",
            "must be between 0.1 and 600 seconds",
        ));
    }
    Ok(SlurmSpec {
        poll_max: Duration::from_secs_f64(poll),
        defaults: check_slurm_resources(ctx, "executor.slurm", raw)?,
    })
}

/// Options tarn sets on every job itself; a campaign may not pass them again, because
/// tarn depends on them to find, watch and collect its jobs.
const SLURM_OWN_OPTIONS: &[&str] = &[
    "--parsable",
    "--job-name",
    "-J",
    "--chdir",
    "-D",
    "--output",
    "-o",
    "--error",
    "-e",
    "--export",
    "--wrap",
    "--array",
    "-a",
    "--wait",
    "-W",
];

/// One table of Slurm resources, at `path` (`executor.slurm` or `STAGE.slurm`).
fn check_slurm_resources(
    ctx: &Ctx,
    path: &str,
    raw: RawSlurmExecutor,
) -> Result<SlurmResources, SpecError> {
    if let Some(p) = &raw.partition {
        let ok = !p.is_empty()
            && p.chars()
                .all(|c| c.is_ascii_alphanumeric() || "-_.,".contains(c));
        if !ok {
            return Err(ctx.err(
                &format!("{path}.partition"),
                format!("'{p}' is not a partition name (letters, digits, '-', '_', '.'; several separated by ',')"),
            ));
        }
    }
    let time_limit_minutes = raw
        .time_limit
        .as_deref()
        .map(|t| {
            slurm_minutes(t).ok_or_else(|| {
                ctx.err(
                    &format!("{path}.time_limit"),
                    format!("'{t}' is not a Slurm time limit: use \"MINUTES\", \"HH:MM:SS\", \"D-HH\" or \"D-HH:MM:SS\" (at least one minute)"),
                )
            })
        })
        .transpose()?;
    if let Some(c) = raw.cpus {
        if c == 0 || c > 4096 {
            return Err(ctx.err(&format!("{path}.cpus"), "must be between 1 and 4096"));
        }
    }
    if let Some(m) = &raw.memory {
        let digits = m.trim_end_matches(['K', 'M', 'G', 'T']);
        let ok = m.len() - digits.len() <= 1
            && !digits.is_empty()
            && digits.chars().all(|c| c.is_ascii_digit())
            && digits.parse::<u64>().is_ok_and(|v| v > 0);
        if !ok {
            return Err(ctx.err(
                &format!("{path}.memory"),
                format!("'{m}' is not a memory size: a whole number with an optional unit K, M, G or T, e.g. \"4G\""),
            ));
        }
    }
    let sbatch_args = raw.sbatch_args.unwrap_or_default();
    for (i, a) in sbatch_args.iter().enumerate() {
        let at = format!("{path}.sbatch_args[{i}]");
        if !a.starts_with('-') {
            return Err(ctx.err(
                &at,
                format!("'{a}' is not an option: write each sbatch option as one word with its value, e.g. \"--qos=short\""),
            ));
        }
        let name = a.split('=').next().unwrap_or(a);
        let own = SLURM_OWN_OPTIONS.iter().any(|o| {
            name == *o || (o.len() == 2 && name.starts_with(o) && !name.starts_with("--"))
        });
        if own {
            return Err(ctx.err(
                &at,
                format!("'{a}': tarn sets {name} itself to watch and collect its jobs; remove it"),
            ));
        }
    }
    Ok(SlurmResources {
        partition: raw.partition,
        time_limit_minutes,
        cpus: raw.cpus,
        memory: raw.memory,
        sbatch_args,
    })
}

/// Whole minutes of a Slurm time limit ("M", "M:S", "H:M:S", "D-H", "D-H:M",
/// "D-H:M:S"), rounded up as Slurm rounds it; `None` when it does not parse or is
/// under a minute of zero.
pub fn slurm_minutes(t: &str) -> Option<u64> {
    let num = |s: &str| -> Option<u64> {
        (!s.is_empty() && s.len() <= 9 && s.chars().all(|c| c.is_ascii_digit()))
            .then(|| s.parse().ok())
            .flatten()
    };
    let (days, rest) = match t.split_once('-') {
        Some((d, r)) => (Some(num(d)?), r),
        None => (None, t),
    };
    let parts: Vec<u64> = rest.split(':').map(num).collect::<Option<_>>()?;
    let seconds = match (days, parts.as_slice()) {
        (None, [m]) => m * 60,
        (None, [m, s]) => m * 60 + s,
        (None, [h, m, s]) => h * 3600 + m * 60 + s,
        (Some(d), [h]) => d * 86400 + h * 3600,
        (Some(d), [h, m]) => d * 86400 + h * 3600 + m * 60,
        (Some(d), [h, m, s]) => d * 86400 + h * 3600 + m * 60 + s,
        _ => return None,
    };
    let minutes = seconds.div_ceil(60);
    (minutes > 0).then_some(minutes)
}

/// Converts a TOML table to JSON for `task.json` (TOML datetimes become strings).
pub fn toml_to_json(t: &toml::Table) -> serde_json::Value {
    fn conv(v: &toml::Value) -> serde_json::Value {
        match v {
            toml::Value::String(s) => serde_json::Value::String(s.clone()),
            toml::Value::Integer(i) => serde_json::Value::from(*i),
            toml::Value::Float(f) => serde_json::Number::from_f64(*f)
                .map(serde_json::Value::Number)
                .unwrap_or(serde_json::Value::Null),
            toml::Value::Boolean(b) => serde_json::Value::Bool(*b),
            toml::Value::Datetime(d) => serde_json::Value::String(d.to_string()),
            toml::Value::Array(a) => serde_json::Value::Array(a.iter().map(conv).collect()),
            toml::Value::Table(t) => {
                serde_json::Value::Object(t.iter().map(|(k, v)| (k.clone(), conv(v))).collect())
            }
        }
    }
    serde_json::Value::Object(t.iter().map(|(k, v)| (k.clone(), conv(v))).collect())
}

#[cfg(test)]
mod tests;
