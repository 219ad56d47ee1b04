//! The fault matrix: one test per way the world can hurt a running campaign — a worker
//! killed by a signal, a worker flooding its output, result files cut off mid-write,
//! a read-only store, a damaged store file, read commands that must not write, two
//! `tarn run` racing to create one campaign, shell metacharacters in a worker's
//! arguments and parameters, outputs that are symbolic links out of the task directory
//! or FIFOs, the disk filling up during a commit, the clock jumping. Each test asserts
//! a message a user can act on and a store that is intact afterwards (its digest, its
//! rounds, or its bytes).
//!
//! Two rows need tools from outside the test: the full disk mounts a tmpfs (root), the
//! clock jump preloads Debian's libfaketime. Without them they say SKIPPED; with
//! `TARN_REQUIRE_FAULT_TOOLS=1` (as CI sets) they fail instead.
//!
//! The workers are small Python programs (numpy only) written into each test's
//! temporary directory; the campaign file names them by relative paths, so that two
//! environments holding the same campaign have byte-identical campaign files and a
//! faulty-then-repaired campaign can be compared with a clean one by digest.

mod common;

use std::collections::BTreeMap;
use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::sync::{Arc, Barrier};
use std::time::{Duration, Instant};

use common::{wait_with_limit, walk_campaign, Env, Run};
use sha2::{Digest, Sha256};

/// The worker of every test here. Round 1 always succeeds (one sample: the start point
/// moved by a seeded step, with its Müller–Brown energy); from round 2 on it misbehaves
/// as the mode file (argv[1]) says.
const WORKER: &str = r#"
import json, os, sys
import numpy as np

A = np.array([-200.0, -100.0, -170.0, 15.0])
a = np.array([-1.0, -1.0, -6.5, 0.7])
b = np.array([0.0, 0.0, 11.0, 0.6])
c = np.array([-10.0, -10.0, -6.5, 0.7])
X0 = np.array([1.0, 0.0, -0.5, -1.0])
Y0 = np.array([0.0, 0.5, 1.5, 1.0])

def energy(p):
    dx, dy = p[0] - X0, p[1] - Y0
    return float(np.sum(A * np.exp(a * dx * dx + b * dx * dy + c * dy * dy)))

def result_text(outputs):
    return json.dumps({"protocol": 1, "status": "ok", "outputs": outputs,
                       "metrics": {}, "energy_evals": 1})

task = json.load(open(os.environ["TARN_TASK"]))
mode_file = sys.argv[1]
outside = os.path.dirname(os.path.abspath(mode_file))
mode = open(mode_file).read().strip()
x = np.load(task["inputs"]["start"])[:1].copy()
x += 1e-3 * np.random.default_rng(task["seed"]).standard_normal(x.shape)
e = np.array([energy(x[0])])
outputs = {"samples": "out/samples.npy", "energies": "out/energies.npy"}
late = task["round"] >= 2

if mode == "args":
    # The arguments and parameters must arrive exactly as written, one argv entry each.
    want_argv = ["$(touch pwned)", "; rm -rf x", "`touch pwned`", "a b", "--help"]
    want_params = {"inject": "; rm -rf x", "subst": "$(touch pwned)", "tick": "`touch pwned`"}
    if sys.argv[2:] != want_argv or task["params"] != want_params:
        print("argv", sys.argv[2:], "params", task["params"], file=sys.stderr)
        sys.exit(7)
if mode == "sigkill" and late:
    os.kill(os.getpid(), 9)
if mode == "exit" and late:
    print("worker: simulated failure", file=sys.stderr)
    sys.exit(3)
if mode == "flood" and task["round"] == 1 and task["walker"] == 0:
    block = b"x" * (1 << 20)
    for _ in range(200):
        sys.stdout.buffer.write(block)
    sys.stdout.flush()
    sys.stderr.write("flood done\n")
np.save("out/samples.npy", x)
np.save("out/energies.npy", e)
if mode == "halfjson" and late:
    text = result_text(outputs)
    open("out/result.json", "w").write(text[: len(text) // 2])
    sys.exit(0)
if mode == "halfnpy" and late:
    data = open("out/samples.npy", "rb").read()
    open("out/samples.npy", "wb").write(data[: len(data) - 5])
if mode == "symlink_output" and late:
    np.save(os.path.join(outside, "outside.npy"), x)
    os.remove("out/samples.npy")
    os.symlink(os.path.join(outside, "outside.npy"), "out/samples.npy")
if mode == "symlink_result" and late:
    open(os.path.join(outside, "result.json"), "w").write(result_text(outputs))
    os.symlink(os.path.join(outside, "result.json"), "out/result.json")
    sys.exit(0)
if mode == "fifo" and late:
    os.mkfifo("out/result.json")
    sys.exit(0)
if mode == "fill" and task["round"] == 2 and task["walker"] == 0:
    # A 2 MiB output, then fill the file system that holds the task directory (the
    # campaign's own small tmpfs) to within 256 KiB: the output is written, but
    # committing it into the store must run out of space.
    np.save("out/cv.npy", np.zeros((1, 1 << 18)))
    outputs["cv"] = "out/cv.npy"
    filler = os.path.join(os.environ["TARN_TASK_DIR"], "..", "..", "..", "..", "filler")
    st = os.statvfs(".")
    spare = st.f_bavail * st.f_frsize - (256 << 10)
    with open(filler, "wb") as f:
        while spare > 0:
            n = min(spare, 1 << 20)
            f.write(b"\1" * n)
            spare -= n
if mode == "clock":
    # The clock of tarn (not of this worker) is the file clock.txt, read through
    # libfaketime. Round 2 moves it 30 days back and its first attempt of walker 0
    # hangs past the timeout; round 3 moves it 400 days ahead while walker 0 works
    # for 2 s, well inside its timeout.
    import time
    clock = os.path.join(outside, "clock.txt")
    attempt = os.path.basename(os.environ["TARN_TASK_DIR"])
    if task["round"] == 2 and task["walker"] == 0:
        open(clock, "w").write("-30d\n")
        if attempt == "a1":
            time.sleep(600)
    if task["round"] == 3 and task["walker"] == 0:
        open(clock, "w").write("+400d\n")
        time.sleep(2)
tmp = "out/result.json.tmp"
open(tmp, "w").write(result_text(outputs))
os.rename(tmp, "out/result.json")
"#;

/// Settings of a test campaign that vary between rows of the matrix.
struct Setup<'a> {
    rounds: u32,
    keep: &'a str,
    /// Extra entries of the worker's command array, after the mode file.
    extra_args: &'a [&'a str],
    /// Lines of the stage's `[explore.params]` table.
    params: &'a str,
    timeout: f64,
}

impl Default for Setup<'_> {
    fn default() -> Self {
        Setup {
            rounds: 3,
            keep: "failed",
            extra_args: &[],
            params: "",
            timeout: 20.0,
        }
    }
}

/// Writes the worker, the mode file and a campaign named `faults` into `env`; returns
/// the campaign file's path.
fn campaign(env: &Env, mode: &str, s: &Setup) -> PathBuf {
    env.write("worker.py", WORKER);
    env.write("mode.txt", mode);
    let extra: String = s
        .extra_args
        .iter()
        .map(|a| format!(", {}", toml_string(a)))
        .collect();
    let params = if s.params.is_empty() {
        String::new()
    } else {
        format!("[explore.params]\n{}\n", s.params)
    };
    let command = format!(r#""python3", "worker.py", "mode.txt"{extra}"#);
    let explore_extra = format!("timeout_seconds = {}\n{params}", s.timeout);
    let executor = format!(
        "[executor]
max_parallel = 2
keep_task_dirs = \"{}\"
[executor.retry]
attempts = 2
initial_seconds = 0.05
max_seconds = 0.1
",
        s.keep
    );
    let text = walk_campaign("faults", 5, &command, &explore_extra, s.rounds, &executor);
    env.write("faults.toml", &text)
}

/// A TOML basic string holding `s` literally.
fn toml_string(s: &str) -> String {
    serde_json::to_string(s).expect("a string serialises")
}

fn run(env: &Env, file: &Path) -> Run {
    env.tarn(&["run", file.to_str().unwrap(), "--quiet"])
}

fn set_mode(env: &Env, mode: &str) {
    std::fs::write(env.path().join("mode.txt"), mode).unwrap();
}

fn rounds_json(env: &Env) -> Vec<serde_json::Value> {
    env.json(&["rounds", "faults"]).as_array().unwrap().clone()
}

/// SHA-256 of every file under `dir`, by relative path.
fn tree_hashes(dir: &Path) -> BTreeMap<String, String> {
    let mut out = BTreeMap::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for entry in std::fs::read_dir(&d).unwrap() {
            let p = entry.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else {
                let bytes = std::fs::read(&p).unwrap();
                let rel = p.strip_prefix(dir).unwrap().display().to_string();
                out.insert(rel, hex::encode(Sha256::digest(&bytes)));
            }
        }
    }
    out
}

/// Every path under `dir` whose file name is `name`.
fn find_named(dir: &Path, name: &str) -> Vec<PathBuf> {
    let mut hits = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&d) else {
            continue;
        };
        for entry in entries {
            let p = entry.unwrap().path();
            if p.file_name().is_some_and(|n| n == name) {
                hits.push(p.clone());
            }
            if p.is_dir() && !p.is_symlink() {
                stack.push(p);
            }
        }
    }
    hits
}

/// The digest of the same campaign run cleanly (mode `ok`) in a fresh environment.
fn clean_digest(s: &Setup) -> String {
    let env = Env::new();
    let file = campaign(&env, "ok", s);
    run(&env, &file).code(0);
    env.digest("faults")
}

/// Asserts that a faulty round-2 task failed both attempts with `want` in the message,
/// and that round 1 alone is in the store.
fn assert_round_two_failed(r: &Run, want: &str) {
    r.code(1);
    assert!(
        r.stderr.contains(want),
        "wanted {want:?}; stderr was\n{}",
        r.stderr
    );
    assert!(
        r.stderr.contains("the task failed 2 attempts"),
        "{}",
        r.stderr
    );
}

/// Row: a worker killed by SIGKILL (by itself, from round 2 on). The attempt is
/// reported as killed by signal 9, retried, and failed; round 1 and the digest are
/// untouched by any number of failing resumes; once the worker behaves, the campaign
/// finishes with the digest of a campaign that never failed.
#[test]
fn a_worker_killed_by_sigkill_fails_clearly_and_leaves_the_store_intact() {
    let setup = Setup::default();
    let env = Env::new();
    let file = campaign(&env, "sigkill", &setup);
    let r = run(&env, &file);
    assert_round_two_failed(
        &r,
        "task r0002.walk.w000: the worker was killed by signal 9",
    );
    let rounds = rounds_json(&env);
    assert_eq!(rounds.len(), 1, "round 1 must be intact");
    let digest = env.digest("faults");
    // Failing again changes nothing scientific.
    let again = env.tarn(&["resume", "faults", "--quiet"]);
    assert_round_two_failed(&again, "killed by signal 9");
    assert_eq!(
        env.digest("faults"),
        digest,
        "a failed resume changed the digest"
    );
    assert_eq!(rounds_json(&env), rounds);
    set_mode(&env, "ok");
    env.tarn(&["resume", "faults", "--quiet"]).code(0);
    let after = rounds_json(&env);
    assert_eq!(after.len(), 3);
    assert_eq!(after[0], rounds[0], "round 1 changed");
    assert_eq!(env.digest("faults"), clean_digest(&setup));
}

/// Row: a worker writing 200 MB to its stdout as fast as it can. tarn keeps exactly the
/// documented first 64 MiB in `stdout.log`, at most 4 KiB of tail in the store, does not
/// stall, and the campaign's science is that of a quiet worker.
#[test]
fn a_worker_flooding_its_stdout_is_capped_at_64_mib_and_the_campaign_finishes() {
    let setup = Setup {
        rounds: 1,
        keep: "all",
        ..Setup::default()
    };
    let env = Env::new();
    let file = campaign(&env, "flood", &setup);
    let t = Instant::now();
    run(&env, &file).code(0);
    let secs = t.elapsed().as_secs_f64();
    assert!(secs < 30.0, "a 200 MB flood took {secs:.1} s");
    let logs = find_named(&env.state().join("faults/tasks"), "stdout.log");
    let flooded: Vec<u64> = logs
        .iter()
        .map(|p| std::fs::metadata(p).unwrap().len())
        .filter(|&n| n > 0)
        .collect();
    assert_eq!(flooded, vec![64 << 20], "stdout.log sizes of {logs:?}");
    // The flooding task's record keeps only a tail.
    let out = env.path().join("export");
    env.tarn(&["export", "faults", "--out", out.to_str().unwrap()])
        .code(0);
    let text = std::fs::read_to_string(out.join("events.json")).unwrap_or_default();
    assert!(
        text.len() < 1 << 20,
        "the event log holds {} bytes",
        text.len()
    );
    let db_bytes: u64 = tree_hashes(&env.state().join("faults/db"))
        .keys()
        .map(|k| {
            std::fs::metadata(env.state().join("faults/db").join(k))
                .unwrap()
                .len()
        })
        .sum();
    assert!(
        db_bytes < 32 << 20,
        "the store grew to {db_bytes} bytes: the flood reached it"
    );
    assert_eq!(env.digest("faults"), clean_digest(&setup));
}

/// Row: result files cut off mid-write — half a `result.json` (exit status 0), and a
/// `samples.npy` missing its last bytes. Each is refused naming the task, the file and
/// the problem; round 1 and the digest stay; the repaired worker finishes the campaign.
#[test]
fn truncated_result_files_are_refused_by_name_and_the_store_is_intact() {
    let setup = Setup::default();
    let clean = clean_digest(&setup);
    let cases = [
        (
            "halfjson",
            "task r0002.walk.w000: out/result.json: line 1 column 70: malformed JSON: EOF while parsing a string at line 1 column 70",
        ),
        (
            "halfnpy",
            "task r0002.walk.w000: out/samples.npy: outputs.samples: the body holds 11 bytes but the header's shape [1, 2] needs 16",
        ),
    ];
    for (mode, want) in cases {
        let env = Env::new();
        let file = campaign(&env, mode, &setup);
        assert_round_two_failed(&run(&env, &file), want);
        let rounds = rounds_json(&env);
        assert_eq!(rounds.len(), 1, "mode {mode}: round 1 must be intact");
        let digest = env.digest("faults");
        assert_round_two_failed(&env.tarn(&["resume", "faults", "--quiet"]), want);
        assert_eq!(env.digest("faults"), digest, "mode {mode}");
        set_mode(&env, "ok");
        env.tarn(&["resume", "faults", "--quiet"]).code(0);
        assert_eq!(rounds_json(&env)[0], rounds[0], "mode {mode}");
        assert_eq!(env.digest("faults"), clean, "mode {mode}");
    }
}

/// Whether this process can write into a directory whose permission bits forbid it
/// (root, or a process with CAP_DAC_OVERRIDE).
fn permission_bits_are_ignored(dir: &Path) -> bool {
    let probe_dir = dir.join("probe");
    std::fs::create_dir(&probe_dir).unwrap();
    set_writable(&probe_dir, false);
    let ignored = std::fs::write(probe_dir.join("x"), b"x").is_ok();
    set_writable(&probe_dir, true);
    std::fs::remove_dir_all(&probe_dir).unwrap();
    ignored
}

/// `chmod -R a-w` (or `u+w` back) on a tree.
fn set_writable(dir: &Path, writable: bool) {
    let flag = if writable { "u+w" } else { "a-w" };
    let ok = std::process::Command::new("chmod")
        .args(["-R", flag])
        .arg(dir)
        .status()
        .unwrap()
        .success();
    assert!(ok, "chmod -R {flag} {}", dir.display());
}

/// The user id the read-only row runs `tarn` as when the test runs as root, where
/// permission bits do not stop writes (the conventional `nobody`).
const NOBODY: u32 = 65534;

/// Row: the store directory made read-only between runs. `tarn resume` is refused with
/// exit code 1 or 2 and a message naming the store; not one byte of the store changes;
/// once the directory is writable again, resume finishes the campaign.
///
/// Running as root (as CI containers do), permission bits do not stop writes, so the
/// refused resume runs as the unprivileged user `nobody`, to whom the whole temporary
/// directory is handed first; the bits then bind it exactly as they bind a user.
#[test]
fn a_read_only_store_is_refused_with_a_message_and_resume_works_once_writable() {
    let setup = Setup {
        rounds: 2,
        ..Setup::default()
    };
    let env = Env::new();
    let file = campaign(&env, "exit", &setup);
    assert_round_two_failed(&run(&env, &file), "the worker exited with status 3");
    let db = env.state().join("faults/db");
    // The first open after a run lets sled write its recovery snapshot; hash the store
    // after that, when opening it no longer changes it.
    let rounds = rounds_json(&env);
    let before = tree_hashes(&db);
    set_mode(&env, "ok");
    let privileged = permission_bits_are_ignored(env.path());
    if privileged {
        let ok = std::process::Command::new("chown")
            .args(["-R", &format!("{NOBODY}:{NOBODY}")])
            .arg(env.path())
            .status()
            .unwrap()
            .success();
        assert!(ok, "chown to nobody");
    }
    set_writable(&db, false);
    let mut cmd = env.cmd(&["resume", "faults", "--quiet"]);
    if privileged {
        cmd.uid(NOBODY).gid(NOBODY);
    }
    let out = cmd.stdin(Stdio::null()).output().expect("run tarn");
    let code = out.status.code().unwrap_or(-1);
    let stderr = String::from_utf8_lossy(&out.stderr);
    set_writable(&db, true);
    assert!(
        code == 1 || code == 2,
        "resume of a read-only store exited with {code}\n{stderr}"
    );
    assert!(
        stderr.contains(&format!("store {}", db.display()))
            && (stderr.contains("Permission denied") || stderr.contains("read-only")),
        "the message should name the store and the cause:\n{stderr}"
    );
    assert_eq!(
        tree_hashes(&db),
        before,
        "the refused resume changed the store"
    );
    env.tarn(&["resume", "faults", "--quiet"]).code(0);
    let after = rounds_json(&env);
    assert_eq!(after.len(), 2);
    assert_eq!(after[0], rounds[0]);
}

/// The largest file under a directory.
fn largest_file(dir: &Path) -> PathBuf {
    let mut best: Option<(u64, PathBuf)> = None;
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for entry in std::fs::read_dir(&d).unwrap() {
            let p = entry.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else {
                let n = std::fs::metadata(&p).unwrap().len();
                if best.as_ref().is_none_or(|(m, _)| n > *m) {
                    best = Some((n, p));
                }
            }
        }
    }
    best.expect("a file").1
}

/// Row: a store file damaged in its middle (64 bytes inverted halfway through the
/// written part of the largest file under `STATE/NAME/db`, i.e. inside committed
/// records). Reading the store must either refuse it with a message or read it exactly
/// as before (the same digest); in neither case may opening it rewrite the file, and
/// `resume` must refuse it too rather than let sled's recovery cut it back.
///
/// sled's recovery treats the first damaged record as the end of its log and zeroes
/// everything after it; tarn lets that happen only on a private copy (see the module
/// doc of `src/store/mod.rs`), compares what the copy recovered with the commit count
/// it recorded in `commits.json`, and refuses the store naming the damaged file.
#[test]
fn a_damaged_store_file_is_refused_or_read_unchanged_and_never_rewritten() {
    let setup = Setup {
        rounds: 2,
        ..Setup::default()
    };
    let env = Env::new();
    let file = campaign(&env, "ok", &setup);
    run(&env, &file).code(0);
    let digest = env.digest("faults");
    let db = env.state().join("faults/db");
    let target = largest_file(&db);
    let mut bytes = std::fs::read(&target).unwrap();
    let used = bytes.iter().rposition(|&b| b != 0).expect("a written file") + 1;
    let mid = used / 2;
    for b in &mut bytes[mid..mid + 64] {
        *b = !*b;
    }
    std::fs::write(&target, &bytes).unwrap();
    let before = tree_hashes(&db);
    let r = env.tarn(&["digest", "faults"]);
    let after = tree_hashes(&db);
    match r.code {
        0 => assert_eq!(
            r.stdout.trim(),
            digest,
            "the damaged store read differently without a word ({})",
            target.display()
        ),
        _ => assert!(
            r.stderr.contains(&format!("store {}", db.display())) && r.code == 2,
            "a refusal must name the store and exit 2 (got {}):\n{}",
            r.code,
            r.stderr
        ),
    }
    let damaged_now = std::fs::read(&target).unwrap();
    let changed = bytes
        .iter()
        .zip(&damaged_now)
        .filter(|(a, b)| a != b)
        .count();
    assert_eq!(
        after,
        before,
        "opening the damaged store rewrote {changed} bytes of {} (exit {}: {})",
        target.display(),
        r.code,
        r.stderr.trim()
    );
    // The engine's open is refused the same way, and leaves the files as they are.
    if r.code != 0 {
        let resumed = env.tarn(&["resume", "faults", "--quiet"]);
        resumed.code(2);
        assert!(
            resumed.stderr.contains("is damaged")
                && resumed
                    .stderr
                    .contains(&db.join("db").display().to_string()),
            "resume must name the damaged file:\n{}",
            resumed.stderr
        );
        assert_eq!(
            tree_hashes(&db),
            before,
            "the refused resume changed the store"
        );
    }
}

/// Row: the read commands (`status`, `rounds`, `states`, `export`, `report`,
/// `digest`) never write to the store: they read a private copy, so not one byte under
/// `STATE/NAME/db` changes, not even sled's recovery snapshot after a killed run.
#[test]
fn read_commands_never_write_to_the_store() {
    let setup = Setup {
        rounds: 2,
        ..Setup::default()
    };
    let env = Env::new();
    let file = campaign(&env, "ok", &setup);
    run(&env, &file).code(0);
    let db = env.state().join("faults/db");
    let before = tree_hashes(&db);
    let digest = env.digest("faults");
    let out = env.path().join("export");
    let page = env.path().join("report.html");
    // The private copies go to this test's own temporary directory, which must be
    // empty again after each command.
    let tmp = env.path().join("tmp");
    std::fs::create_dir(&tmp).unwrap();
    for args in [
        vec!["status", "faults"],
        vec!["rounds", "faults", "--json"],
        vec!["states", "faults", "--json"],
        vec!["export", "faults", "--out", out.to_str().unwrap()],
        vec!["report", "faults", "--out", page.to_str().unwrap()],
        vec!["digest", "faults"],
    ] {
        let out = env
            .cmd(&args)
            .env("TMPDIR", &tmp)
            .stdin(Stdio::null())
            .output()
            .unwrap();
        assert!(out.status.success(), "`tarn {}`: {:?}", args[0], out);
        assert_eq!(
            tree_hashes(&db),
            before,
            "`tarn {}` wrote to the store",
            args[0]
        );
        let left: Vec<_> = std::fs::read_dir(&tmp).unwrap().collect();
        assert!(left.is_empty(), "`tarn {}` left {left:?}", args[0]);
    }
    assert_eq!(env.digest("faults"), digest);
}

/// Row: damage in the unwritten tail of sled's file (beyond its last record) loses
/// nothing — the store is accepted and every command reads the same digest. (sled
/// leaves a zeroed tail when the engine reopens a store, as a `resume` of a finished
/// campaign does; read commands no longer write, so they never make one.)
#[test]
fn damage_beyond_the_written_records_does_not_change_what_the_store_reads() {
    let setup = Setup {
        rounds: 1,
        ..Setup::default()
    };
    let env = Env::new();
    let file = campaign(&env, "ok", &setup);
    run(&env, &file).code(0);
    env.tarn(&["resume", "faults", "--quiet"]).code(0);
    let digest = env.digest("faults");
    let target = largest_file(&env.state().join("faults/db"));
    let mut bytes = std::fs::read(&target).unwrap();
    let used = bytes.iter().rposition(|&b| b != 0).expect("a written file") + 1;
    assert!(
        used + 4096 < bytes.len(),
        "no unwritten tail in {}",
        target.display()
    );
    let at = (used + bytes.len()) / 2;
    for b in &mut bytes[at..at + 64] {
        *b = 0xA5;
    }
    std::fs::write(&target, &bytes).unwrap();
    assert_eq!(env.digest("faults"), digest);
    assert_eq!(rounds_json(&env).len(), 1);
}

/// Row: two `tarn run` processes started at the same instant on a campaign that has no
/// store yet, three times over. Exactly one runs it; the other exits 2 naming the lock
/// or the other's pid; the campaign that ran is the clean campaign (same digest).
#[test]
fn two_runs_racing_to_create_one_campaign_one_runs_and_the_other_is_refused() {
    let setup = Setup {
        rounds: 1,
        ..Setup::default()
    };
    let clean = clean_digest(&setup);
    for attempt in 0..3 {
        let env = Arc::new(Env::new());
        let file = campaign(&env, "ok", &setup);
        let barrier = Arc::new(Barrier::new(2));
        let handles: Vec<_> = (0..2)
            .map(|_| {
                let (env, barrier, file) = (env.clone(), barrier.clone(), file.clone());
                std::thread::spawn(move || {
                    let mut cmd = env.cmd(&["run", file.to_str().unwrap(), "--quiet"]);
                    cmd.stdin(Stdio::null())
                        .stdout(Stdio::piped())
                        .stderr(Stdio::piped());
                    barrier.wait();
                    let child = cmd.spawn().expect("spawn tarn");
                    let pid = child.id();
                    (pid, wait_with_limit(child, Duration::from_secs(60)))
                })
            })
            .collect();
        let runs: Vec<(u32, Run)> = handles.into_iter().map(|h| h.join().unwrap()).collect();
        let codes: Vec<i32> = runs.iter().map(|(_, r)| r.code).collect();
        let winners = codes.iter().filter(|&&c| c == 0).count();
        assert_eq!(
            winners, 1,
            "attempt {attempt}: exit codes {codes:?}\n{}\n{}",
            runs[0].1.stderr, runs[1].1.stderr
        );
        let (winner_pid, _) = runs.iter().find(|(_, r)| r.code == 0).unwrap();
        let (_, loser) = runs.iter().find(|(_, r)| r.code != 0).unwrap();
        loser.code(2);
        assert!(
            loser.stderr.contains("in use by another tarn process")
                || loser.stderr.contains(&format!("pid {winner_pid}")),
            "attempt {attempt}: the refusal names neither the lock nor the pid:\n{}",
            loser.stderr
        );
        assert_eq!(env.digest("faults"), clean, "attempt {attempt}");
    }
}

/// Row: shell metacharacters in a worker's command array and in its parameters. They
/// reach the worker literally, one argument each (the worker checks and fails
/// otherwise), and nothing runs them: no file `pwned` appears anywhere and the canary
/// directory `x` survives.
#[test]
fn shell_metacharacters_in_arguments_and_params_are_never_executed() {
    let setup = Setup {
        rounds: 2,
        keep: "all",
        extra_args: &[
            "$(touch pwned)",
            "; rm -rf x",
            "`touch pwned`",
            "a b",
            "--help",
        ],
        params: "inject = \"; rm -rf x\"\nsubst = \"$(touch pwned)\"\ntick = \"`touch pwned`\"",
        ..Setup::default()
    };
    let env = Env::new();
    let file = campaign(&env, "args", &setup);
    std::fs::create_dir(env.path().join("x")).unwrap();
    std::fs::write(env.path().join("x/keep"), b"canary").unwrap();
    // `tarn check` shows the argument array exactly as it will run: one entry each.
    let plan = env.json(&["check", file.to_str().unwrap()]);
    let argv = &plan["commands"][0]["argv"];
    let mut want = vec![
        "python3".to_string(),
        env.path().join("worker.py").display().to_string(),
        env.path().join("mode.txt").display().to_string(),
    ];
    want.extend(setup.extra_args.iter().map(|a| a.to_string()));
    assert_eq!(argv, &serde_json::json!(want), "{plan}");
    run(&env, &file).code(0);
    assert_eq!(rounds_json(&env).len(), 2);
    assert_eq!(find_named(env.path(), "pwned"), Vec::<PathBuf>::new());
    assert!(env.path().join("x/keep").exists(), "the canary was removed");
    // Every task ran once and succeeded the first time (2 rounds of 2 walkers and a
    // quench): the worker accepted its arguments in every task.
    let tasks = find_named(&env.state().join("faults/tasks"), "task.json");
    assert_eq!(tasks.len(), 2 * 3, "task directories: {tasks:?}");
    assert!(
        tasks.iter().all(|t| t.parent().unwrap().ends_with("a1")),
        "{tasks:?}"
    );
}

/// Row: outputs that are symbolic links leading out of the task directory — an array
/// and `result.json` itself. Both are refused with a message naming the path; the file
/// outside is not read into the store.
#[test]
fn outputs_that_are_symlinks_out_of_the_task_directory_are_refused_by_name() {
    let setup = Setup::default();
    let cases = [
        (
            "symlink_output",
            "task r0002.walk.w000: out/result.json: outputs.samples: path 'out/samples.npy' resolves to ",
            "outside.npy outside the task directory",
        ),
        (
            "symlink_result",
            "task r0002.walk.w000: out/result.json: (file): is a symbolic link",
            "tarn reads only plain files the worker wrote",
        ),
    ];
    for (mode, want, tail) in cases {
        let env = Env::new();
        let file = campaign(&env, mode, &setup);
        let r = run(&env, &file);
        assert_round_two_failed(&r, want);
        assert!(r.stderr.contains(tail), "mode {mode}: {}", r.stderr);
        let rounds = rounds_json(&env);
        assert_eq!(rounds.len(), 1, "mode {mode}");
        let digest = env.digest("faults");
        set_mode(&env, "ok");
        env.tarn(&["resume", "faults", "--quiet"]).code(0);
        assert_eq!(rounds_json(&env)[0], rounds[0], "mode {mode}");
        assert_ne!(env.digest("faults"), digest);
    }
}

/// Row: a worker that leaves a FIFO named `out/result.json` and exits 0. Opening it
/// would block until a writer appears, which never happens; tarn refuses any file that
/// is not a regular file before opening it, and the attempt fails.
#[test]
fn a_fifo_as_result_json_fails_the_attempt_instead_of_hanging() {
    let env = Env::new();
    let file = campaign(&env, "fifo", &Setup::default());
    let child = env.spawn(&["run", file.to_str().unwrap(), "--quiet"]);
    let r = wait_with_limit(child, Duration::from_secs(40));
    assert_round_two_failed(&r, "task r0002.walk.w000: out/result.json");
    assert_eq!(rounds_json(&env).len(), 1);
}

/// A tmpfs mounted on a directory for the length of a test (root only), unmounted
/// when dropped.
struct Tmpfs(PathBuf);

impl Tmpfs {
    /// Mounts a tmpfs of `size` (e.g. `"12m"`) on `dir`, or says why it cannot.
    fn mount(dir: &Path, size: &str) -> Result<Tmpfs, String> {
        std::fs::create_dir_all(dir).unwrap();
        let out = std::process::Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(dir)
            .output()
            .map_err(|e| format!("cannot run mount: {e}"))?;
        if out.status.success() {
            Ok(Tmpfs(dir.to_path_buf()))
        } else {
            Err(String::from_utf8_lossy(&out.stderr).trim().to_string())
        }
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let _ = std::process::Command::new("umount")
            .arg("-l")
            .arg(&self.0)
            .status();
    }
}

/// Whether a missing facility must fail the test instead of skipping it (CI sets
/// `TARN_REQUIRE_FAULT_TOOLS=1`).
fn required() -> bool {
    std::env::var_os("TARN_REQUIRE_FAULT_TOOLS").is_some_and(|v| v == "1")
}

/// Row: the disk filling up during a commit. The campaign directory is a 12 MiB tmpfs;
/// in round 2 a worker writes a 2 MiB output and then fills the file system to within
/// 256 KiB, so that committing the output runs out of space. tarn stops with a message
/// naming the store and the cause (it checks the free space before sled writes: sled
/// 0.34 meeting the full disk itself hung tarn in one of four runs here); the store
/// still opens and holds round 1 exactly;
/// once the space is freed, `resume` finishes the campaign with the digest of a
/// campaign that never ran out of space.
#[test]
fn a_disk_filling_up_during_a_commit_keeps_the_last_round_and_resume_works() {
    let setup = Setup::default();
    let env = Env::new();
    let file = campaign(&env, "fill", &setup);
    let dir = env.state().join("faults");
    let _mount = match Tmpfs::mount(&dir, "12m") {
        Ok(m) => m,
        Err(why) if !required() => {
            eprintln!("SKIPPED: cannot mount a tmpfs ({why}); run as root to test a full disk");
            return;
        }
        Err(why) => panic!("cannot mount a tmpfs: {why}"),
    };
    let r = run(&env, &file);
    assert_ne!(r.code, 0, "the run should stop when the disk is full");
    eprintln!("the full-disk run said: {}", r.stderr.trim());
    assert!(
        r.stderr.contains("No space left on device")
            && r.stderr.contains(&format!("store {}", dir.display())),
        "the message should name the store and the cause (exit {}):\n{}",
        r.code,
        r.stderr
    );
    // The last committed round survives, and reading it needs no space on the full
    // file system (read commands work on a copy in TMPDIR).
    let rounds = rounds_json(&env);
    assert_eq!(rounds.len(), 1, "{rounds:?}");
    assert_eq!(rounds[0]["round"], 1);
    let digest_full = env.digest("faults");
    // Resuming while the disk is still full fails cleanly and loses nothing.
    let again = env.tarn(&["resume", "faults", "--quiet"]);
    assert_ne!(again.code, 0, "{}", again.stderr);
    assert_eq!(env.digest("faults"), digest_full);
    // Space freed: resume finishes, and the result is the clean campaign's.
    std::fs::remove_file(dir.join("filler")).unwrap();
    set_mode(&env, "ok");
    env.tarn(&["resume", "faults", "--quiet"]).code(0);
    let after = rounds_json(&env);
    assert_eq!(after.len(), 3);
    assert_eq!(after[0], rounds[0]);
    assert_eq!(env.digest("faults"), clean_digest(&setup));
}

/// The libfaketime library of Debian's `faketime` package.
const FAKETIME_LIB: &str = "/usr/lib/x86_64-linux-gnu/faketime/libfaketimeMT.so.1";

/// Row: the clock jumping. tarn runs with its wall clock (CLOCK_REALTIME) taken from a
/// file through libfaketime, the monotonic clock left alone, as an NTP step or an
/// administrator's `date -s` leaves it. In round 2 the clock jumps 30 days back while
/// a worker hangs: the hang is still ended by its 6 s timeout. In round 3 it jumps 400
/// days ahead while a worker works for 2 s: nothing times out early. The campaign
/// finishes with exactly one failed attempt (the hang), the digest of a clean campaign,
/// and the event log's (informational) times showing both jumps.
#[test]
fn the_clock_jumping_back_and_ahead_changes_no_timeout_and_no_result() {
    if !Path::new(FAKETIME_LIB).exists() {
        assert!(
            !required(),
            "{FAKETIME_LIB} is missing (apt-get install faketime)"
        );
        eprintln!("SKIPPED: {FAKETIME_LIB} is missing (apt-get install faketime)");
        return;
    }
    let setup = Setup {
        rounds: 3,
        timeout: 6.0,
        ..Setup::default()
    };
    let env = Env::new();
    let file = campaign(&env, "clock", &setup);
    let clock = env.write("clock.txt", "+0\n");
    let started = Instant::now();
    let mut cmd = env.cmd(&["run", file.to_str().unwrap(), "--quiet"]);
    cmd.env("LD_PRELOAD", FAKETIME_LIB)
        .env("FAKETIME_TIMESTAMP_FILE", &clock)
        .env("FAKETIME_NO_CACHE", "1")
        .env("FAKETIME_DONT_FAKE_MONOTONIC", "1")
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    let r = wait_with_limit(cmd.spawn().unwrap(), Duration::from_secs(120));
    r.code(0);
    assert!(
        started.elapsed() < Duration::from_secs(100),
        "the hang was not ended by its timeout"
    );
    assert_eq!(rounds_json(&env).len(), 3);
    let out = env.path().join("export");
    env.tarn(&["export", "faults", "--out", out.to_str().unwrap()])
        .code(0);
    let events: Vec<serde_json::Value> =
        serde_json::from_str(&std::fs::read_to_string(out.join("events.json")).unwrap()).unwrap();
    let failed: Vec<&serde_json::Value> = events
        .iter()
        .filter(|e| e["kind"] == "attempt_failed")
        .collect();
    assert_eq!(failed.len(), 1, "{failed:?}");
    let msg = failed[0]["message"].as_str().unwrap();
    assert!(
        msg.contains("r0002.walk.w000") && msg.contains("past its timeout"),
        "{msg}"
    );
    // The jumps really reached tarn: its event times go back about 30 days and then
    // ahead about 400 days from the creation time.
    let t0 = events[0]["unix"].as_f64().unwrap();
    let day = 86400.0;
    let times: Vec<f64> = events.iter().map(|e| e["unix"].as_f64().unwrap()).collect();
    assert!(
        times.iter().any(|t| *t < t0 - 29.0 * day),
        "no event time shows the jump back: {times:?}"
    );
    assert!(
        times.iter().any(|t| *t > t0 + 300.0 * day),
        "no event time shows the jump ahead: {times:?}"
    );
    assert_eq!(env.digest("faults"), clean_digest(&setup));
}
