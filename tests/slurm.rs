//! The Slurm executor against a real Slurm: a one-node cluster on this machine, brought
//! up by `tests/slurm/up.sh` (CI does it, see `.ci/run`).
//!
//! Every test that needs Slurm first calls [`slurm`]: without a cluster it prints a
//! visible skip message and returns, unless `TARN_REQUIRE_SLURM=1` says the cluster
//! must be there, in which case it fails. The campaign-file checks at the top need no
//! cluster.
//!
//! Submissions are counted by a wrapper `sbatch` first on `PATH` that logs each job
//! name before handing over to the real one, so "no job submitted twice" is checked
//! against what reached Slurm, not against tarn's own records.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use common::{example_walk, repo, signal, wait_with_limit, walk_campaign, Env};

/// The one node is shared by every test of this file; the node-failure test takes it
/// alone (a write lock), the others share it (read locks).
static NODE: std::sync::RwLock<()> = std::sync::RwLock::new(());

/// A shared hold on the node for a test that does not disturb it.
fn share_node() -> std::sync::RwLockReadGuard<'static, ()> {
    NODE.read().unwrap_or_else(|e| e.into_inner())
}

/// The real `sbatch`, or why the tests cannot run. Panics when `TARN_REQUIRE_SLURM=1`
/// and the cluster is missing or not idle/usable.
fn slurm() -> Option<PathBuf> {
    let required = std::env::var("TARN_REQUIRE_SLURM").is_ok_and(|v| v == "1");
    let why = match probe() {
        Ok(sbatch) => return Some(sbatch),
        Err(why) => why,
    };
    if required {
        panic!("TARN_REQUIRE_SLURM=1 but Slurm is not usable: {why}");
    }
    loud(&format!(
        "SKIPPED: no usable Slurm here ({why}); run `sudo tests/slurm/up.sh` for a one-node cluster, and set TARN_REQUIRE_SLURM=1 to make this a failure"
    ));
    None
}

/// Writes a line straight to the test process's stderr, past the test harness's
/// capture, so that a skip or a figure is seen even when the test passes.
fn loud(line: &str) {
    use std::io::Write;
    let _ = writeln!(std::io::stderr(), "{line}");
}

fn probe() -> Result<PathBuf, String> {
    let out = Command::new("sinfo")
        .args(["-h", "-o", "%T"])
        .output()
        .map_err(|e| format!("cannot run sinfo: {e}"))?;
    if !out.status.success() {
        return Err(format!(
            "sinfo failed: {}",
            String::from_utf8_lossy(&out.stderr).trim()
        ));
    }
    let states = String::from_utf8_lossy(&out.stdout).to_string();
    let usable = states
        .split_whitespace()
        .any(|s| matches!(s.trim_end_matches('*'), "idle" | "mixed" | "allocated"));
    if !usable {
        return Err(format!("no idle node (sinfo says: {})", states.trim()));
    }
    let which = Command::new("sh")
        .args(["-c", "command -v sbatch"])
        .output()
        .map_err(|e| e.to_string())?;
    let path = String::from_utf8_lossy(&which.stdout).trim().to_string();
    if path.is_empty() {
        return Err("sbatch is not on PATH".into());
    }
    Ok(PathBuf::from(path))
}

/// A test environment whose `PATH` starts with a logging `sbatch` wrapper.
struct Cluster {
    env: Env,
    log: PathBuf,
    path: String,
}

impl Cluster {
    fn new(real_sbatch: &Path) -> Cluster {
        let env = Env::new();
        let bin = env.path().join("bin");
        std::fs::create_dir_all(&bin).unwrap();
        let log = env.path().join("sbatch.log");
        let wrapper = bin.join("sbatch");
        std::fs::write(
            &wrapper,
            format!(
                "#!/bin/sh\n# Logs each submission's job name, then runs the real sbatch. While the\n# file {stall} exists it stalls 30 s after Slurm accepted the job, before printing the id.\nfor a in \"$@\"; do case \"$a\" in --job-name=*) echo \"${{a#--job-name=}}\" >> '{log}' ;; esac; done\nout=$('{real}' \"$@\"); rc=$?\nif [ -e '{stall}' ]; then sleep 30; fi\nprintf '%s\\n' \"$out\"\nexit $rc\n",
                log = log.display(),
                real = real_sbatch.display(),
                stall = env.path().join("stall-sbatch").display(),
            ),
        )
        .unwrap();
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&wrapper, std::fs::Permissions::from_mode(0o755)).unwrap();
        let path = format!(
            "{}:{}",
            bin.display(),
            std::env::var("PATH").unwrap_or_default()
        );
        Cluster { env, log, path }
    }

    fn cmd(&self, args: &[&str]) -> Command {
        let mut c = self.env.cmd(args);
        c.env("PATH", &self.path);
        c
    }

    fn tarn(&self, args: &[&str]) -> common::Run {
        let out = self
            .cmd(args)
            .stdin(std::process::Stdio::null())
            .output()
            .expect("run tarn");
        common::Run {
            code: out.status.code().unwrap_or(-1),
            stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
        }
    }

    fn spawn(&self, args: &[&str]) -> std::process::Child {
        self.cmd(args)
            .stdin(std::process::Stdio::null())
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .expect("spawn tarn")
    }

    /// Every job name submitted so far, in order.
    fn submissions(&self) -> Vec<String> {
        std::fs::read_to_string(&self.log)
            .unwrap_or_default()
            .lines()
            .map(String::from)
            .collect()
    }
}

impl Cluster {
    /// The Slurm jobs this environment's tarn submitted: (id, name, state). Jobs of
    /// other tests and of earlier runs are left out, even of a campaign with the same
    /// name (their names differ in the hash of the attempt directory).
    fn queue(&self) -> Vec<(String, String, String)> {
        let mine: std::collections::BTreeSet<String> = self.submissions().into_iter().collect();
        let out = Command::new("squeue")
            .args(["-h", "-t", "all", "-o", "%i|%j|%T"])
            .output()
            .expect("squeue");
        String::from_utf8_lossy(&out.stdout)
            .lines()
            .filter_map(|l| {
                let mut p = l.split('|');
                Some((
                    p.next()?.to_string(),
                    p.next()?.to_string(),
                    p.next()?.to_string(),
                ))
            })
            .filter(|(_, n, _)| mine.contains(n))
            .collect()
    }

    /// Waits until `pred` holds for this environment's jobs.
    fn wait_queue(
        &self,
        limit: Duration,
        what: &str,
        pred: impl Fn(&[(String, String, String)]) -> bool,
    ) -> Vec<(String, String, String)> {
        let t = Instant::now();
        loop {
            let q = self.queue();
            if pred(&q) {
                return q;
            }
            assert!(t.elapsed() < limit, "{what} within {limit:?}; queue: {q:?}");
            std::thread::sleep(Duration::from_millis(100));
        }
    }
}

/// The example Python walk, a few rounds, with a given `[executor]` section.
fn walk_text(executor: &str, rounds: u32, walkers: u32) -> String {
    example_walk(rounds).replace("walkers = 3", &format!("walkers = {walkers}")) + executor
}

/// The faulty test worker's campaign (misbehaving from round 2 as the mode file says),
/// on Slurm.
fn faulty_text(env: &Env, name: &str, mode: &str, rounds: u32, extra: &str) -> String {
    let mode_file = env.write(&format!("{name}.mode"), mode);
    let command = format!(
        "\"python3\", \"{}\", \"{}\"",
        repo().join("tests/workers/faulty.py").display(),
        mode_file.display()
    );
    let executor = format!(
        "[executor]
kind = \"slurm\"
max_parallel = 4
[executor.retry]
attempts = 2
initial_seconds = 0.05
max_seconds = 0.1
[executor.slurm]
poll_max_seconds = 1
{extra}
"
    );
    walk_campaign(name, 3, &command, "", rounds, &executor)
}

/// The events of a campaign whose message mentions `needle`.
fn events_with(env: &Env, campaign: &str, needle: &str) -> Vec<serde_json::Value> {
    let out = env.path().join(format!("export-{campaign}"));
    let r = env.tarn(&["export", campaign, "--out", out.to_str().unwrap()]);
    r.code(0);
    let events: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("events.json")).unwrap()).unwrap();
    events
        .as_array()
        .unwrap()
        .iter()
        .filter(|e| e["message"].as_str().unwrap_or("").contains(needle))
        .cloned()
        .collect()
}

// ---------------------------------------------------------------------------------
// Campaign-file checks (no cluster needed).
// ---------------------------------------------------------------------------------

#[test]
fn slurm_settings_are_validated_with_the_key_and_line() {
    let env = Env::new();
    let cases: &[(&str, &str)] = &[
        (
            "\n[executor]\nkind = \"slurm\"\n[executor.slurm]\ntime_limit = \"soon\"\n",
            "executor.slurm.time_limit: 'soon' is not a Slurm time limit",
        ),
        (
            "\n[executor]\nkind = \"slurm\"\n[executor.slurm]\nmemory = \"4 GB\"\n",
            "executor.slurm.memory: '4 GB' is not a memory size",
        ),
        (
            "\n[executor]\nkind = \"slurm\"\n[executor.slurm]\ncpus = 0\n",
            "executor.slurm.cpus: must be between 1 and 4096",
        ),
        (
            "\n[executor]\nkind = \"slurm\"\n[executor.slurm]\nsbatch_args = [\"--qos=short\", \"--output=x\"]\n",
            "executor.slurm.sbatch_args[1]: '--output=x': tarn sets --output itself",
        ),
        (
            "\n[executor]\nkind = \"slurm\"\n[executor.slurm]\nsbatch_args = [\"qos short\"]\n",
            "executor.slurm.sbatch_args[0]: 'qos short' is not an option",
        ),
        (
            "\n[executor]\nkind = \"slurm\"\n[executor.slurm]\npartition = \"a b\"\n",
            "executor.slurm.partition: 'a b' is not a partition name",
        ),
        (
            "\n[executor]\nkind = \"slurm\"\n[executor.slurm]\nqueue = \"x\"\n",
            "unknown field `queue`",
        ),
        (
            "\n[executor.slurm]\ncpus = 2\n",
            "executor.slurm: is set but executor.kind is 'local'",
        ),
        (
            "\n[executor]\nkind = \"pbs\"\n",
            "executor.kind: 'pbs' is not an executor this build knows (choose: local, slurm)",
        ),
    ];
    for (tail, want) in cases {
        let text = walk_text(tail, 1, 1);
        let file = env.write("bad.toml", &text);
        let r = env.tarn(&["check", file.to_str().unwrap()]);
        r.code(2);
        assert!(r.stderr.contains(want), "want {want:?}, got\n{}", r.stderr);
        // Errors point at the file and line, like every other campaign-file error.
        assert!(r.stderr.contains("bad.toml:"), "{}", r.stderr);
    }
    // A stage's own table: the stage in the key path, and refused under a local executor.
    let stage_cases = [
        (
            "\n[executor]\nkind = \"slurm\"\n",
            "time_limit = \"0:00\"",
            "dedup.slurm.time_limit: '0:00' is not a Slurm time limit",
        ),
        (
            "",
            "cpus = 2",
            "dedup.slurm: Slurm resources need executor.kind = \"slurm\"",
        ),
    ];
    for (executor, table, want) in stage_cases {
        let text = walk_text(executor, 1, 1).replace(
            "[dedup]\nkind = \"quench\"\n",
            &format!("[dedup]\nkind = \"quench\"\n[dedup.slurm]\n{table}\n"),
        );
        let file = env.write("bad.toml", &text);
        let r = env.tarn(&["check", file.to_str().unwrap()]);
        r.code(2);
        assert!(r.stderr.contains(want), "want {want:?}, got\n{}", r.stderr);
    }
    // A good one passes.
    let good = walk_text(
        "\n[executor]\nkind = \"slurm\"\n[executor.slurm]\npartition = \"debug\"\ntime_limit = \"1-00:30:00\"\ncpus = 2\nmemory = \"4G\"\nsbatch_args = [\"--qos=normal\"]\n",
        1,
        1,
    )
    .replace(
        "[dedup]\nkind = \"quench\"\n",
        "[explore.slurm]\ntime_limit = \"30\"\n\n[dedup]\nkind = \"quench\"\n",
    );
    let file = env.write("good.toml", &good);
    let r = env.tarn(&["check", file.to_str().unwrap()]);
    r.code(0);
    // The plan shows what each stage's jobs ask for: the stage's table over the
    // executor's, the day-hour time limit in minutes, the campaign's arguments last.
    assert!(
        r.stdout.contains("each task is one Slurm job asking for:"),
        "{}",
        r.stdout
    );
    let line = |stage: &str| {
        r.stdout
            .lines()
            .find(|l| l.trim_start().starts_with(stage) && l.contains("--time="))
            .unwrap_or_else(|| panic!("no resources line for {stage} in\n{}", r.stdout))
            .to_string()
    };
    let common = "--cpus-per-task=2 --partition=debug --mem=4G --qos=normal";
    assert!(
        line("walk").ends_with(&format!("--time=30 {common}")),
        "{}",
        r.stdout
    );
    assert!(
        line("dedup").ends_with(&format!("--time=1470 {common}")),
        "{}",
        r.stdout
    );
    let plan = env.json(&["check", file.to_str().unwrap()]);
    let walk = &plan["commands"][0];
    assert_eq!(walk["stage"], "walk");
    assert_eq!(walk["sbatch_resources"][0], "--time=30");
}

// ---------------------------------------------------------------------------------
// Against the cluster.
// ---------------------------------------------------------------------------------

const SLURM_EXECUTOR: &str = "
[executor]
kind = \"slurm\"
max_parallel = 8
[executor.slurm]
poll_max_seconds = 1
";

#[test]
fn a_campaign_through_slurm_has_the_local_digest_and_reports_cost() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    let local = Env::new();
    let file = local.write("walk.toml", &walk_text("", 3, 3));
    local
        .tarn(&["run", file.to_str().unwrap(), "--quiet"])
        .code(0);
    let want = local.digest("python-walk");

    let c = Cluster::new(&sbatch);
    let file = c.env.write("walk.toml", &walk_text(SLURM_EXECUTOR, 3, 3));
    c.tarn(&["run", file.to_str().unwrap(), "--quiet"]).code(0);
    assert_eq!(c.env.digest("python-walk"), want, "Slurm and local differ");
    // 3 rounds of 3 walkers and a dedup task, each submitted once.
    let subs = c.submissions();
    assert_eq!(subs.len(), 12, "{subs:?}");
    // Cost is still reported: CPU time from the job script's `times`, wall time of the
    // job.
    let rounds = c.env.json(&["rounds", "python-walk"]);
    for r in rounds.as_array().unwrap() {
        let walk = &r["stages"][0];
        assert!(
            walk["cpu_seconds"].as_f64().unwrap() > 0.0,
            "no CPU time through Slurm: {walk}"
        );
        assert!(walk["wall_seconds"].as_f64().unwrap() > 0.0, "{walk}");
    }
    assert!(c.queue().iter().all(|(_, _, s)| s == "COMPLETED"));
}

#[test]
fn a_failing_job_is_retried_and_fails_with_the_worker_message() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    let c = Cluster::new(&sbatch);
    let file = c
        .env
        .write("f.toml", &faulty_text(&c.env, "sfail", "exit", 2, ""));
    let r = c.tarn(&["run", file.to_str().unwrap(), "--quiet"]);
    r.code(1);
    let want = "task r0002.walk.w000: the worker exited with status 3; its stderr ends: worker: simulated crash";
    assert!(r.stderr.contains(want), "{}", r.stderr);
    assert!(
        r.stderr.contains("the task failed 2 attempts"),
        "{}",
        r.stderr
    );
    // Round 2's walkers were each submitted twice (two attempts), nothing else again.
    let subs = c.submissions();
    let w0: Vec<_> = subs
        .iter()
        .filter(|s| s.starts_with("sfail.r0002.walk.w000."))
        .collect();
    assert_eq!(w0.len(), 2, "{subs:?}");
    assert!(w0[0].contains(".a1.") && w0[1].contains(".a2."), "{w0:?}");
    // Slurm agrees that the jobs failed.
    let q = c.queue();
    assert!(
        q.iter()
            .any(|(_, n, s)| n.starts_with("sfail.r0002.walk.w000.a1.") && s == "FAILED"),
        "{q:?}"
    );
    // Fixed, the campaign resumes to its end.
    std::fs::write(c.env.path().join("sfail.mode"), "ok").unwrap();
    c.tarn(&["resume", "sfail", "--quiet"]).code(0);
}

#[test]
fn a_job_past_its_slurm_time_limit_is_a_timeout() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    let c = Cluster::new(&sbatch);
    // One attempt only: Slurm counts time limits in minutes and checks them about every
    // 30 s, so this test waits about 90 s.
    let text = faulty_text(&c.env, "slimit", "hang", 2, "time_limit = \"1\"")
        .replace("attempts = 2", "attempts = 1")
        .replace("walkers = 2", "walkers = 1");
    let file = c.env.write("t.toml", &text);
    let t = Instant::now();
    let r = c.tarn(&["run", file.to_str().unwrap(), "--quiet"]);
    r.code(1);
    assert!(
        r.stderr.contains("task r0002.walk.w000: the Slurm job ")
            && r.stderr.contains(
                "ran past its time limit of 00:01:00 and was ended by Slurm (state TIMEOUT)"
            ),
        "{}",
        r.stderr
    );
    assert!(t.elapsed() >= Duration::from_secs(60), "{:?}", t.elapsed());
    let q = c.queue();
    assert!(q.iter().any(|(_, _, s)| s == "TIMEOUT"), "{q:?}");
}

#[test]
fn a_job_cancelled_behind_tarns_back_is_retried() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    let c = Cluster::new(&sbatch);
    let text =
        faulty_text(&c.env, "scancelled", "hang", 2, "").replace("walkers = 2", "walkers = 1");
    let file = c.env.write("c.toml", &text);
    let child = c.spawn(&["run", file.to_str().unwrap(), "--quiet"]);
    let q = c.wait_queue(Duration::from_secs(60), "round 2's job running", |q| {
        q.iter()
            .any(|(_, n, s)| n.starts_with("scancelled.r0002.walk.w000.a1.") && s == "RUNNING")
    });
    let (id, _, _) = q
        .iter()
        .find(|(_, n, _)| n.starts_with("scancelled.r0002.walk.w000.a1."))
        .unwrap()
        .clone();
    // The retry behaves.
    std::fs::write(c.env.path().join("scancelled.mode"), "ok").unwrap();
    let s = Command::new("scancel").arg(&id).status().unwrap();
    assert!(s.success());
    let r = wait_with_limit(child, Duration::from_secs(60));
    r.code(0);
    let failed = events_with(&c.env, "scancelled", "r0002.walk.w000");
    let msg = failed
        .iter()
        .find(|e| e["kind"] == "attempt_failed")
        .unwrap_or_else(|| panic!("no attempt_failed event: {failed:?}"));
    let text = msg["message"].as_str().unwrap();
    assert!(
        text.contains(&format!(
            "the Slurm job {id} was cancelled outside tarn (scancel, or an administrator) (state CANCELLED"
        )),
        "{text}"
    );
    let subs = c.submissions();
    assert_eq!(
        subs.iter()
            .filter(|s| s.starts_with("scancelled.r0002.walk.w000."))
            .count(),
        2,
        "{subs:?}"
    );
}

/// Kills tarn with SIGKILL three times while its jobs are queued and running, resumes
/// each time, and checks that no job was submitted twice and that the digest is the
/// uninterrupted local run's.
#[test]
fn sigkill_while_jobs_are_queued_and_running_then_resume_submits_nothing_twice() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    // Four walkers on a two-CPU node: two run, two wait in the queue.
    let local = Env::new();
    let text = |exec: &str| walk_text(exec, 3, 4);
    let file = local.write("walk.toml", &text(""));
    local
        .tarn(&["run", file.to_str().unwrap(), "--quiet"])
        .code(0);
    let want = local.digest("python-walk");

    let c = Cluster::new(&sbatch);
    let file = c.env.write("walk.toml", &text(SLURM_EXECUTOR));
    let mut kills = 0;
    for round in 1..=3u32 {
        let args: Vec<&str> = if round == 1 {
            vec!["run", file.to_str().unwrap(), "--quiet"]
        } else {
            vec!["resume", "python-walk", "--quiet"]
        };
        let child = c.spawn(&args);
        let prefix = format!("python-walk.r{round:04}.walk.");
        let q = c.wait_queue(
            Duration::from_secs(60),
            "jobs of the round queued and running",
            |q| {
                let mine: Vec<_> = q
                    .iter()
                    .filter(|(_, n, _)| n.starts_with(&prefix))
                    .collect();
                mine.iter().any(|(_, _, s)| s == "RUNNING")
                    && (mine.iter().any(|(_, _, s)| s == "PENDING") || mine.len() == 4)
            },
        );
        signal(&child, 9);
        let r = wait_with_limit(child, Duration::from_secs(10));
        assert_ne!(r.code, 0, "tarn finished before the kill");
        kills += 1;
        eprintln!("killed tarn with the queue at {q:?}");
    }
    // Let some of the orphaned jobs end while no tarn is watching, then resume.
    std::thread::sleep(Duration::from_secs(2));
    c.tarn(&["resume", "python-walk", "--quiet"]).code(0);
    assert_eq!(kills, 3);
    assert_eq!(
        c.env.digest("python-walk"),
        want,
        "digest after {kills} kills"
    );
    let subs = c.submissions();
    let mut counts: BTreeMap<&str, usize> = BTreeMap::new();
    for s in &subs {
        *counts.entry(s.as_str()).or_default() += 1;
    }
    let twice: Vec<_> = counts.iter().filter(|(_, n)| **n > 1).collect();
    assert!(twice.is_empty(), "submitted more than once: {twice:?}");
    // Every task of the 3 rounds (4 walkers and a dedup each) went out once, on its
    // first attempt.
    assert_eq!(subs.len(), 15, "{subs:?}");
    assert!(subs.iter().all(|s| s.contains(".a1.")), "{subs:?}");
}

/// Per-task overhead through Slurm against the local executor, and how many tasks tarn
/// keeps in flight; prints figures, asserts only that the campaigns finished.
#[test]
fn overhead_and_tasks_in_flight_figures() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    let hold = |name: &str, walkers: u32, parallel: u32, exec: &str| {
        tarn::bench_engine::campaign_text(name, walkers, 1, parallel, exec)
    };
    let n = 10u32;
    let time_run = |c: &Cluster, name: &str, text: &str| {
        let file = c.env.write(&format!("{name}.toml"), text);
        let t = Instant::now();
        c.tarn(&["run", file.to_str().unwrap(), "--quiet"]).code(0);
        t.elapsed().as_secs_f64()
    };
    let c = Cluster::new(&sbatch);
    // One task at a time: the time per task is the overhead (a `hold` task computes
    // nothing). n walkers plus the round's dedup task.
    let local_s = time_run(&c, "olocal", &hold("olocal", n, 1, ""));
    let slurm_s = time_run(
        &c,
        "oslurm",
        &hold(
            "oslurm",
            n,
            1,
            "kind = \"slurm\"\n[executor.slurm]\npoll_max_seconds = 1",
        ),
    );
    let per = |s: f64| s / f64::from(n + 1) * 1e3;
    // Many at once: 40 walkers, all allowed in flight.
    let wide = 40u32;
    let name = "owide";
    let file = c.env.write(
        "owide.toml",
        &hold(
            name,
            wide,
            wide,
            "kind = \"slurm\"\n[executor.slurm]\npoll_max_seconds = 1",
        ),
    );
    let t = Instant::now();
    let mut child = c.spawn(&["run", file.to_str().unwrap(), "--quiet"]);
    let mut peak = 0usize;
    let mut first_full = None;
    while child.try_wait().unwrap().is_none() {
        let q: Vec<_> = c
            .queue()
            .into_iter()
            .filter(|(_, n, _)| n.starts_with("owide."))
            .collect();
        let live = q
            .iter()
            .filter(|(_, _, s)| matches!(s.as_str(), "PENDING" | "RUNNING" | "COMPLETING"))
            .count();
        peak = peak.max(live);
        if first_full.is_none() && q.len() >= wide as usize {
            first_full = Some(t.elapsed().as_secs_f64());
        }
        if t.elapsed() > Duration::from_secs(300) {
            let _ = child.kill();
            panic!("the wide campaign did not finish");
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    wait_with_limit(child, Duration::from_secs(5)).code(0);
    let wide_s = t.elapsed().as_secs_f64();
    let submitted = c.submissions().len();
    loud(&format!(
        "FIGURES slurm executor: local {:.1} ms/task, slurm {:.1} ms/task (one at a time, {} tasks each: overhead {:.1} ms/task); {wide} walkers through Slurm: {:.2} tasks/s end to end, all {wide} submitted within {:.2} s ({:.1} submissions/s), at most {peak} jobs in the queue at once; {submitted} submissions in all",
        per(local_s),
        per(slurm_s),
        n + 1,
        per(slurm_s) - per(local_s),
        f64::from(wide + 1) / wide_s,
        first_full.unwrap_or(f64::NAN),
        f64::from(wide) / first_full.unwrap_or(f64::NAN),
    ));
    assert_eq!(submitted, (n + 1 + wide + 1) as usize);
}

/// tarn killed while `sbatch` is still running: Slurm has the job, tarn only its
/// "submitting" record. The resumed tarn finds the job by its name and waits for it
/// instead of submitting it again.
#[test]
fn a_tarn_killed_inside_sbatch_finds_its_job_by_name_on_resume() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    let c = Cluster::new(&sbatch);
    let text = faulty_text(&c.env, "sinside", "ok", 1, "").replace("walkers = 2", "walkers = 1");
    let file = c.env.write("i.toml", &text);
    let stall = c.env.write("stall-sbatch", "");
    let child = c.spawn(&["run", file.to_str().unwrap(), "--quiet"]);
    // The job is in Slurm's hands, while sbatch (stalled) has not told tarn its id.
    c.wait_queue(Duration::from_secs(60), "the job accepted by Slurm", |q| {
        !q.is_empty()
    });
    signal(&child, 9);
    wait_with_limit(child, Duration::from_secs(10));
    std::fs::remove_file(&stall).unwrap();
    c.tarn(&["resume", "sinside", "--quiet"]).code(0);
    let subs = c.submissions();
    assert_eq!(
        subs.len(),
        2,
        "the walker and the dedup task, once each: {subs:?}"
    );
    assert!(
        subs[0].starts_with("sinside.r0001.walk.w000.a1."),
        "{subs:?}"
    );
    assert!(
        subs[1].starts_with("sinside.r0001.dedup.w000.a1."),
        "{subs:?}"
    );
}

/// Ctrl-C with no terminal: tarn leaves its jobs queued and running, exits 3 at once,
/// and `resume` waits for those very jobs instead of submitting them again.
#[test]
fn ctrl_c_without_a_terminal_leaves_the_jobs_and_resume_collects_them() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    let c = Cluster::new(&sbatch);
    let text = faulty_text(&c.env, "sleave", "slow", 1, "").replace("walkers = 2", "walkers = 4");
    let file = c.env.write("l.toml", &text);
    let child = c.spawn(&["run", file.to_str().unwrap()]);
    c.wait_queue(Duration::from_secs(60), "a job running", |q| {
        q.iter().any(|(_, _, s)| s == "RUNNING")
    });
    signal(&child, 2);
    let t = Instant::now();
    let r = wait_with_limit(child, Duration::from_secs(30));
    r.code(3);
    assert!(
        t.elapsed() < Duration::from_secs(5),
        "tarn waited for its jobs: {:?}",
        t.elapsed()
    );
    assert!(
        r.stderr.contains("Slurm job(s) queued or running")
            && r.stderr.contains(&format!(
                "`tarn --state {} resume sleave` waits for them",
                c.env.state().display()
            )),
        "{}",
        r.stderr
    );
    // Nothing was cancelled.
    let q = c.queue();
    assert!(q.iter().all(|(_, _, s)| s != "CANCELLED"), "{q:?}");
    let before = c.submissions().len();
    c.tarn(&["resume", "sleave", "--quiet"]).code(0);
    let subs = c.submissions();
    // Only tasks never submitted before were submitted now (the dedup task and any
    // walker whose turn had not come): every name once.
    let distinct: std::collections::BTreeSet<_> = subs.iter().collect();
    assert_eq!(distinct.len(), subs.len(), "{subs:?}");
    assert_eq!(subs.len(), 5, "{subs:?} ({before} before the resume)");
}

/// Ctrl-C on a terminal: tarn asks, and "y" cancels the running jobs (tarn's own
/// cancellation, recorded as such); resume runs them again as second attempts.
#[test]
fn ctrl_c_on_a_terminal_asks_and_yes_cancels_the_jobs() {
    let Some(sbatch) = slurm() else { return };
    let _node = share_node();
    if Command::new("script").arg("--version").output().is_err() {
        loud(
            "SKIPPED the terminal Ctrl-C test: util-linux `script` (a pseudo-terminal) is missing",
        );
        return;
    }
    let c = Cluster::new(&sbatch);
    let text = faulty_text(&c.env, "sask", "hang", 2, "").replace("walkers = 2", "walkers = 1");
    let file = c.env.write("a.toml", &text);
    // `script` runs tarn on a pseudo-terminal and forwards our pipe to it.
    let inner = format!(
        "{} run {} --quiet",
        env!("CARGO_BIN_EXE_tarn"),
        file.display()
    );
    let mut child = Command::new("script")
        .args(["-qfec", &inner, "/dev/null"])
        .env("TARN_STATE", c.env.state())
        .env("PATH", &c.path)
        .current_dir(c.env.path())
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("script");
    let q = c.wait_queue(Duration::from_secs(60), "round 2's job running", |q| {
        q.iter()
            .any(|(_, n, s)| n.starts_with("sask.r0002.walk.w000.a1.") && s == "RUNNING")
    });
    let status: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(c.env.state().join("sask/status.json")).unwrap(),
    )
    .unwrap();
    let pid = status["pid"].as_i64().unwrap() as i32;
    // SAFETY: kill(2) on the tarn process this test started (through `script`).
    unsafe { kill(pid, 2) };
    std::thread::sleep(Duration::from_millis(500));
    {
        use std::io::Write;
        let stdin = child.stdin.as_mut().unwrap();
        stdin.write_all(b"y\n").unwrap();
        stdin.flush().unwrap();
    }
    let r = wait_with_limit(child, Duration::from_secs(60));
    let shown = format!("{}{}", r.stdout, r.stderr);
    assert!(
        shown.contains(
            "Cancel the 1 Slurm job(s) of campaign sask that are queued or running? [y/N]"
        ),
        "{shown}"
    );
    assert!(shown.contains("cancelling the Slurm jobs"), "{shown}");
    let (id, _, _) = q
        .iter()
        .find(|(_, n, _)| n.starts_with("sask.r0002.walk.w000.a1."))
        .unwrap()
        .clone();
    let q = c.queue();
    assert!(
        q.iter().any(|(i, _, s)| *i == id && s == "CANCELLED"),
        "{q:?}"
    );
    std::fs::write(c.env.path().join("sask.mode"), "ok").unwrap();
    c.tarn(&["resume", "sask", "--quiet"]).code(0);
    let subs = c.submissions();
    assert!(
        subs.iter()
            .any(|s| s.starts_with("sask.r0002.walk.w000.a2.")),
        "{subs:?}"
    );
    let cancelled = events_with(&c.env, "sask", "attempt cancelled");
    assert!(
        !cancelled.is_empty(),
        "tarn did not record its cancellation"
    );
}

extern "C" {
    fn kill(pid: i32, sig: i32) -> i32;
}

/// A node failure under a running job: Slurm ends it as NODE_FAIL, tarn retries it
/// (tarn submits with --no-requeue, so its retry policy, not Slurm's requeue, decides).
#[test]
fn a_job_lost_with_its_node_is_retried() {
    let Some(sbatch) = slurm() else { return };
    let _node = NODE.write().unwrap_or_else(|e| e.into_inner());
    let c = Cluster::new(&sbatch);
    let text = faulty_text(&c.env, "snode", "hang", 2, "").replace("walkers = 2", "walkers = 1");
    let file = c.env.write("n.toml", &text);
    let child = c.spawn(&["run", file.to_str().unwrap(), "--quiet"]);
    let q = c.wait_queue(Duration::from_secs(60), "round 2's job running", |q| {
        q.iter()
            .any(|(_, n, s)| n.starts_with("snode.r0002.walk.w000.a1.") && s == "RUNNING")
    });
    let node = Command::new("squeue")
        .args(["-h", "-j", &q[q.len() - 1].0, "-o", "%N"])
        .output()
        .unwrap();
    let node = String::from_utf8_lossy(&node.stdout).trim().to_string();
    std::fs::write(c.env.path().join("snode.mode"), "ok").unwrap();
    let scontrol = |state: &str| {
        Command::new("scontrol")
            .args([
                "update",
                &format!("nodename={node}"),
                &format!("state={state}"),
            ])
            .args(if state == "down" {
                vec!["reason=tarn-test"]
            } else {
                vec![]
            })
            .stderr(std::process::Stdio::null())
            .status()
            .unwrap()
    };
    assert!(scontrol("down").success());
    // Bring the node back whatever happens next.
    let t = Instant::now();
    loop {
        let s = Command::new("sinfo")
            .args(["-h", "-n", &node, "-o", "%T"])
            .output()
            .unwrap();
        let s = String::from_utf8_lossy(&s.stdout).trim().to_string();
        if s == "idle" || s == "mixed" || s == "allocated" {
            break;
        }
        if s.starts_with("down") || s.starts_with("drain") {
            let _ = scontrol("resume");
        }
        assert!(
            t.elapsed() < Duration::from_secs(60),
            "node {node} stays {s}"
        );
        std::thread::sleep(Duration::from_millis(200));
    }
    let r = wait_with_limit(child, Duration::from_secs(60));
    r.code(0);
    let events = events_with(&c.env, "snode", "r0002.walk.w000");
    let failed = events
        .iter()
        .find(|e| e["kind"] == "attempt_failed")
        .unwrap_or_else(|| panic!("no attempt_failed event: {events:?}"));
    assert!(
        failed["message"]
            .as_str()
            .unwrap()
            .contains("was lost with its node (state NODE_FAIL"),
        "{failed}"
    );
}
