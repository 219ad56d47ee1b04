//! The integration-test harness: a temporary state directory, campaign files written
//! into it, and `tarn` run as a user would run it.

#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

/// A temporary place with its own state directory.
pub struct Env {
    pub dir: tempfile::TempDir,
}

/// What a finished `tarn` invocation printed and returned.
pub struct Run {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

impl Run {
    fn from(o: Output) -> Run {
        Run {
            code: o.status.code().unwrap_or(-1),
            stdout: String::from_utf8_lossy(&o.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&o.stderr).into_owned(),
        }
    }

    /// Asserts the exit code, showing both streams when it differs.
    pub fn code(&self, want: i32) -> &Self {
        assert_eq!(
            self.code, want,
            "exit code\n--- stdout\n{}\n--- stderr\n{}",
            self.stdout, self.stderr
        );
        self
    }
}

/// The repository root (for examples and test workers).
pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

impl Env {
    pub fn new() -> Env {
        Env {
            dir: tempfile::tempdir().expect("temp dir"),
        }
    }

    pub fn path(&self) -> &Path {
        self.dir.path()
    }

    pub fn state(&self) -> PathBuf {
        self.path().join("state")
    }

    /// Writes a file into the environment and returns its path.
    pub fn write(&self, name: &str, text: &str) -> PathBuf {
        let p = self.path().join(name);
        std::fs::write(&p, text).expect("write");
        p
    }

    /// A `tarn` command with this environment's state directory.
    pub fn cmd(&self, args: &[&str]) -> Command {
        let mut c = Command::new(env!("CARGO_BIN_EXE_tarn"));
        c.args(args)
            .env("TARN_STATE", self.state())
            .current_dir(self.path())
            .env_remove("RUST_LOG");
        c
    }

    /// Runs `tarn` to its end.
    pub fn tarn(&self, args: &[&str]) -> Run {
        Run::from(
            self.cmd(args)
                .stdin(Stdio::null())
                .output()
                .expect("run tarn"),
        )
    }

    /// Starts `tarn` without waiting.
    pub fn spawn(&self, args: &[&str]) -> Child {
        self.cmd(args)
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("spawn tarn")
    }

    /// The campaign's digest.
    pub fn digest(&self, name: &str) -> String {
        let r = self.tarn(&["digest", name]);
        r.code(0);
        r.stdout.trim().to_string()
    }

    /// Parsed `--json` output of a read command.
    pub fn json(&self, args: &[&str]) -> serde_json::Value {
        let mut a = args.to_vec();
        a.push("--json");
        let r = self.tarn(&a);
        r.code(0);
        serde_json::from_str(&r.stdout).expect("json output")
    }

    /// Waits until the status snapshot says the campaign is running a task.
    pub fn wait_running(&self, name: &str, limit: Duration) {
        let t = Instant::now();
        let path = self.state().join(name).join("status.json");
        while t.elapsed() < limit {
            if let Ok(text) = std::fs::read_to_string(&path) {
                let v: serde_json::Value = serde_json::from_str(&text).unwrap_or_default();
                if v["phase"] == "running"
                    && v["tasks_running"].as_array().is_some_and(|a| !a.is_empty())
                {
                    return;
                }
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        panic!("campaign {name} did not start a task within {limit:?}");
    }
}

/// Waits for a child with a limit; kills it when the limit passes.
pub fn wait_with_limit(mut child: Child, limit: Duration) -> Run {
    let t = Instant::now();
    loop {
        if let Some(_status) = child.try_wait().expect("try_wait") {
            return Run::from(child.wait_with_output().expect("output"));
        }
        if t.elapsed() > limit {
            let _ = child.kill();
            panic!("tarn did not end within {limit:?}");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// Sends a signal to a child process.
pub fn signal(child: &Child, sig: i32) {
    // SAFETY: kill(2) with a pid we own.
    unsafe {
        libc_kill(child.id() as i32, sig);
    }
}

extern "C" {
    #[link_name = "kill"]
    fn libc_kill(pid: i32, sig: i32) -> i32;
}

/// The campaign most integration tests run: the Müller–Brown surface from two points,
/// one explore stage `walk` of two walkers running `command` (the items of a TOML
/// array, e.g. `"python3", "worker.py", "mode.txt"`) with `explore_extra` lines after
/// its walkers, a built-in quench, `rounds` rounds, and the `executor` section as given.
pub fn walk_campaign(
    name: &str,
    seed: u64,
    command: &str,
    explore_extra: &str,
    rounds: u32,
    executor: &str,
) -> String {
    format!(
        r#"name = "{name}"
seed = {seed}
kT = 10.0

[system]
model = "muller-brown"

[start]
points = [[-0.558, 1.442], [0.623, 0.028]]

[[explore]]
name = "walk"
command = [{command}]
walkers = 2
{explore_extra}
[dedup]
kind = "quench"

[stop]
max_rounds = {rounds}

{executor}"#
    )
}

/// The example Python random-walk campaign (`examples/python-worker/`) with its worker
/// at an absolute path, 400 steps per walker instead of 2000, and `rounds` rounds.
pub fn example_walk(rounds: u32) -> String {
    std::fs::read_to_string(repo().join("examples/python-worker/campaign.toml"))
        .expect("the example campaign")
        .replace(
            "random_walk.py",
            repo()
                .join("examples/python-worker/random_walk.py")
                .to_str()
                .expect("a UTF-8 path"),
        )
        .replace("n_steps = 2000", "n_steps = 400")
        .replace("max_rounds = 5", &format!("max_rounds = {rounds}"))
}
