//! The soak test: a 200-round campaign of fast workers with worker faults injected at a
//! set rate (a crash by SIGKILL, a non-zero exit, NaN energies, a hang past a 4 s
//! timeout) while tarn itself is SIGKILLed at random moments and resumed. It must end
//! with the digest of the same campaign run cleanly, with every injected fault
//! accounted for — as a failed attempt in its task's record and as an event in the
//! store's event log — with no failure that was not injected, and with no sample lost.
//! It prints the counts.
//!
//! Fault injection is deterministic: the worker decides from its task seed and its
//! attempt number (every attempt of a task gets the same seed; the attempt number is
//! the name of its directory, `aN`, in `TARN_TASK_DIR`). Attempts 3 and later never
//! fault, so with three attempts per session no task fails past its retries. A fault
//! whose attempt was cut off by a kill of tarn is not recorded by that session, but the
//! next session runs the same attempt number again, which makes the same decision; so
//! the distinct faults the workers logged are exactly the failed attempts in the store.

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::time::{Duration, Instant};

use common::{wait_with_limit, walk_campaign, Env};
use rand::{Rng, SeedableRng};

/// Rounds of the campaign.
const ROUNDS: u32 = 200;
/// Probability that an attempt (1 or 2) of an explore task faults.
const FAULT_RATE: f64 = 0.06;
/// SIGKILLs of tarn during the faulty run.
const KILLS: u32 = 12;

/// The explore worker: plain Python (no numpy, so that it starts in milliseconds). It
/// reads its start point, writes four samples near it with their Müller–Brown energies,
/// and — in mode `faults RATE` — misbehaves as its seed and attempt number decide,
/// logging each fault to `faults.log` beside the mode file before committing it.
const WORKER: &str = r#"
import hashlib, json, math, os, random, signal, struct, sys, time

A = (-200.0, -100.0, -170.0, 15.0)
a = (-1.0, -1.0, -6.5, 0.7)
b = (0.0, 0.0, 11.0, 0.6)
c = (-10.0, -10.0, -6.5, 0.7)
X0 = (1.0, 0.0, -0.5, -1.0)
Y0 = (0.0, 0.5, 1.5, 1.0)

def energy(x, y):
    return sum(A[i] * math.exp(a[i] * (x - X0[i]) ** 2 + b[i] * (x - X0[i]) * (y - Y0[i])
                               + c[i] * (y - Y0[i]) ** 2) for i in range(4))

def read_npy(path):
    raw = open(path, "rb").read()
    n = struct.unpack("<H", raw[8:10])[0]
    body = raw[10 + n:]
    return struct.unpack("<%dd" % (len(body) // 8), body)

def write_npy(path, shape, values):
    shape_text = "(%d,)" % shape[0] if len(shape) == 1 else "(%s)" % ", ".join(map(str, shape))
    header = "{'descr': '<f8', 'fortran_order': False, 'shape': %s, }" % shape_text
    header += " " * ((64 - (10 + len(header) + 1) % 64) % 64) + "\n"
    with open(path, "wb") as f:
        f.write(b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header.encode())
        f.write(struct.pack("<%dd" % len(values), *values))

task = json.load(open(os.environ["TARN_TASK"]))
mode = open(sys.argv[1]).read().split()
attempt = int(os.path.basename(os.environ["TARN_TASK_DIR"])[1:])
fault = None
if mode[0] == "faults" and attempt <= 2:
    h = hashlib.sha256(("soak %d %d" % (task["seed"], attempt)).encode()).digest()
    if int.from_bytes(h[:8], "big") / 2.0 ** 64 < float(mode[1]):
        fault = ("crash", "exit", "nan", "hang")[h[8] % 4]
        log = os.path.join(os.path.dirname(os.path.abspath(sys.argv[1])), "faults.log")
        with open(log, "a") as f:
            f.write("%s %d %s\n" % (task["task_id"], attempt, fault))
if fault == "crash":
    os.kill(os.getpid(), signal.SIGKILL)
if fault == "exit":
    print("soak: injected failure", file=sys.stderr)
    sys.exit(3)
if fault == "hang":
    time.sleep(120)
start = read_npy(task["inputs"]["start"])[:2]
rng = random.Random(task["seed"])
xs, es = [], []
for _ in range(4):
    x, y = start[0] + 1e-3 * rng.gauss(0, 1), start[1] + 1e-3 * rng.gauss(0, 1)
    xs += [x, y]
    es.append(float("nan") if fault == "nan" else energy(x, y))
os.makedirs("out", exist_ok=True)
write_npy("out/samples.npy", (4, 2), xs)
write_npy("out/energies.npy", (4,), es)
result = {"protocol": 1, "status": "ok", "metrics": {}, "energy_evals": 4,
          "outputs": {"samples": "out/samples.npy", "energies": "out/energies.npy"}}
open("out/result.json.tmp", "w").write(json.dumps(result))
os.rename("out/result.json.tmp", "out/result.json")
"#;

/// The campaign's executor: tasks' directories removed, three attempts, short backoff.
const EXECUTOR: &str = "[executor]
max_parallel = 2
keep_task_dirs = \"none\"
[executor.retry]
attempts = 3
initial_seconds = 0.02
max_seconds = 0.05
";

/// Writes the worker, the mode file and the campaign (two walkers per round, a built-in
/// quench, 200 rounds); returns the campaign's path. The timeout is 4 s, not less: a
/// worker that does not hang takes well under 0.1 s, but on a loaded 2-core machine a
/// Python start can stall for a second, and a timeout that fires on a healthy attempt
/// would be a failure nobody injected.
fn setup(env: &Env, mode: &str) -> std::path::PathBuf {
    env.write("worker.py", WORKER);
    env.write("mode.txt", mode);
    let command = r#""python3", "worker.py", "mode.txt""#;
    let text = walk_campaign(
        "soak",
        11,
        command,
        "timeout_seconds = 4.0\n",
        ROUNDS,
        EXECUTOR,
    );
    env.write("soak.toml", &text)
}

/// Total samples committed by explore stages, from `tarn rounds --json`.
fn samples(env: &Env) -> u64 {
    env.json(&["rounds", "soak"])
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|r| r["stages"].as_array().unwrap().clone())
        .filter(|s| s["name"] == "walk")
        .map(|s| s["samples"].as_u64().unwrap())
        .sum()
}

/// The outcome a failed attempt of each fault kind is recorded with.
fn outcome_of(kind: &str) -> &'static str {
    match kind {
        "crash" => "signal",
        "exit" => "exit",
        "nan" => "invalid",
        "hang" => "timeout",
        other => panic!("unknown fault {other}"),
    }
}

#[test]
fn a_long_campaign_with_faults_and_kills_ends_as_a_clean_one() {
    let t0 = Instant::now();
    // The clean campaign, in a thread of its own while the faulty one runs.
    let clean = std::thread::spawn(|| {
        let env = Env::new();
        let file = setup(&env, "clean");
        env.tarn(&["run", file.to_str().unwrap(), "--quiet"])
            .code(0);
        (env.digest("soak"), samples(&env))
    });

    let env = Env::new();
    let file = setup(&env, &format!("faults {FAULT_RATE}"));
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(20261201);
    let (mut kills, mut resumes) = (0u32, 0u32);
    let store_dir = env.state().join("soak");
    let start = |env: &Env| {
        if tarn::store::Store::exists(&store_dir) {
            env.spawn(&["resume", "soak", "--quiet"])
        } else {
            env.spawn(&["run", file.to_str().unwrap(), "--quiet"])
        }
    };
    let mut child = start(&env);
    loop {
        if kills < KILLS {
            let pause = Duration::from_millis(rng.gen_range(300..4000));
            let until = Instant::now() + pause;
            while Instant::now() < until && child.try_wait().unwrap().is_none() {
                std::thread::sleep(Duration::from_millis(10));
            }
            if child.try_wait().unwrap().is_none() {
                child.kill().unwrap();
                child.wait().unwrap();
                kills += 1;
                child = start(&env);
                resumes += 1;
                continue;
            }
        }
        let r = wait_with_limit(child, Duration::from_secs(600));
        if r.code == 0 {
            break;
        }
        // Only an interrupted or failed session may end this way; resume it.
        assert!(r.code == 1 || r.code == 3, "exit {}: {}", r.code, r.stderr);
        child = start(&env);
        resumes += 1;
    }
    let (clean_digest, clean_samples) = clean.join().unwrap();

    // The faults the workers logged, distinct by task and attempt.
    let log = std::fs::read_to_string(env.path().join("faults.log")).unwrap_or_default();
    let injected: BTreeSet<(String, u32, String)> = log
        .lines()
        .map(|l| {
            let mut w = l.split_whitespace();
            let id = w.next().unwrap().to_string();
            let n = w.next().unwrap().parse().unwrap();
            (id, n, w.next().unwrap().to_string())
        })
        .collect();
    let cut_off = log.lines().count() - injected.len();

    // What the store recorded: failed attempts in task records, failure events.
    let store = tarn::store::Store::open_read_only(&store_dir).unwrap();
    let mut recorded = BTreeSet::new();
    let mut errors = BTreeMap::new();
    for t in store.all_tasks().unwrap() {
        assert_eq!(t.status, tarn::store::TaskStatus::Done, "{}", t.id);
        for a in &t.attempts {
            if a.outcome != "ok" {
                recorded.insert((t.id.clone(), a.number, a.outcome.clone()));
                errors.insert((t.id.clone(), a.number), a.error.clone());
            }
        }
    }
    let mut events_per_task: BTreeMap<String, usize> = BTreeMap::new();
    for e in store.events().unwrap() {
        if e.kind == "attempt_failed" || e.kind == "task_failed" {
            let id = e
                .message
                .strip_prefix("task ")
                .and_then(|m| m.split(':').next())
                .unwrap_or("")
                .to_string();
            *events_per_task.entry(id).or_default() += 1;
        }
    }
    let want: BTreeSet<(String, u32, String)> = injected
        .iter()
        .map(|(id, n, kind)| (id.clone(), *n, outcome_of(kind).to_string()))
        .collect();
    let mut faults_per_task: BTreeMap<String, usize> = BTreeMap::new();
    for (id, _, _) in &injected {
        *faults_per_task.entry(id.clone()).or_default() += 1;
    }
    let lost = clean_samples as i64 - samples(&env) as i64;
    let by_kind = |k: &str| injected.iter().filter(|(_, _, kind)| kind == k).count();
    println!(
        "soak: {ROUNDS} rounds, {} s; faults injected {} (crash {}, exit {}, nan {}, hang {}; {cut_off} more cut off by a kill and run again), retries {}, kills {kills}, resumes {resumes}, samples {} of {clean_samples}, lost {lost}",
        t0.elapsed().as_secs(),
        injected.len(),
        by_kind("crash"),
        by_kind("exit"),
        by_kind("nan"),
        by_kind("hang"),
        recorded.len(),
        samples(&env),
    );
    assert!(
        injected.len() >= 10,
        "too few faults to mean anything: {injected:?}"
    );
    assert!(kills >= KILLS / 2, "too few kills landed: {kills}");
    let unexplained: Vec<_> = recorded
        .difference(&want)
        .map(|(id, n, outcome)| (id, n, outcome, &errors[&(id.clone(), *n)]))
        .collect();
    let missing: Vec<_> = want.difference(&recorded).collect();
    assert!(
        unexplained.is_empty() && missing.is_empty(),
        "the failed attempts in the store are not the injected faults: not injected {unexplained:?}, not recorded {missing:?}"
    );
    assert_eq!(
        events_per_task, faults_per_task,
        "the event log does not account for every fault"
    );
    assert_eq!(lost, 0, "samples lost");
    assert_eq!(env.digest("soak"), clean_digest);
}
