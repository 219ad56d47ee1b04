//! Regression tests of the sharp edges a new user met: a closed stdout, control
//! characters from workers, `tarn check`'s commands, the hints after an interrupt or a
//! failure, a moved campaign directory, metric caps and the help of every argument.

mod common;

use std::io::Read;
use std::process::Stdio;

use std::time::Duration;

use common::{example_walk, repo, signal, wait_with_limit, walk_campaign, Env};

/// Runs `tarn args` with stdout a pipe that is closed early: right away, or after one
/// byte. Either way tarn must exit 0 and print nothing on stderr.
fn closed_pipe_is_a_normal_exit(env: &Env, args: &[&str], read_first: bool) {
    let mut child = env
        .cmd(args)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("spawn tarn");
    let mut stdout = child.stdout.take().expect("stdout");
    if read_first {
        let mut byte = [0u8; 1];
        let _ = stdout.read(&mut byte);
    }
    drop(stdout);
    let out = child.wait_with_output().expect("wait");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(
        out.status.code(),
        Some(0),
        "tarn {args:?} with a closed stdout\n--- stderr\n{stderr}"
    );
    assert!(stderr.is_empty(), "tarn {args:?} printed: {stderr}");
}

#[test]
fn every_printing_command_exits_quietly_when_its_reader_stops() {
    let env = Env::new();
    let file = env.write("walk.toml", &example_walk(1));
    let file = file.to_str().unwrap();
    env.tarn(&["run", file, "--quiet"]).code(0);
    let commands: &[&[&str]] = &[
        &["states", "python-walk", "--json"],
        &["states", "python-walk"],
        &["rounds", "python-walk", "--json"],
        &["rounds", "python-walk"],
        &["status", "python-walk", "--json"],
        &["status", "python-walk"],
        &["digest", "python-walk"],
        &["check", file],
        &["check", file, "--json"],
        &["new", "--list"],
        &["--help"],
    ];
    for args in commands {
        for i in 0..10 {
            closed_pipe_is_a_normal_exit(&env, args, i % 2 == 1);
        }
    }
}

/// A campaign whose explore stage is the faulty test worker in `mode` (from round 2 on,
/// as the worker's doc says), with `attempts` attempts per task.
fn faulty_campaign(env: &Env, mode: &str, rounds: u32, attempts: u32) -> std::path::PathBuf {
    let mode_file = env.write("mode.txt", mode);
    let worker = repo().join("tests/workers/faulty.py");
    let command = format!(
        "\"python3\", \"{}\", \"{}\"",
        worker.display(),
        mode_file.display()
    );
    let executor = format!(
        "[executor]\nmax_parallel = 2\n[executor.retry]\nattempts = {attempts}\ninitial_seconds = 0.05\nmax_seconds = 0.1\n"
    );
    env.write(
        "faults.toml",
        &walk_campaign("faults", 3, &command, "", rounds, &executor),
    )
}

/// The escape sequences `faulty.py` writes, as tarn must show them.
const SHOWN: &str = "\\x1b]0;pwned\\x07\\x1b[2J\\x1b[31m";

fn assert_no_control_characters(what: &str, text: &str) {
    assert!(
        !text
            .chars()
            .any(|c| c.is_control() && c != '\n' && c != '\t'),
        "{what} holds a raw control character: {text:?}"
    );
}

#[test]
fn escape_sequences_from_workers_are_shown_escaped() {
    // A worker's stderr tail, in the attempt messages and the final error.
    let env = Env::new();
    let file = faulty_campaign(&env, "ansi", 2, 2);
    let r = env.tarn(&["run", file.to_str().unwrap()]);
    r.code(1);
    assert_no_control_characters("run's stderr", &r.stderr);
    assert!(
        r.stderr
            .contains(&format!("its stderr ends: worker: {SHOWN}red alert")),
        "{}",
        r.stderr
    );
    let status = env.tarn(&["status", "faults"]);
    status.code(0);
    assert_no_control_characters("status", &status.stdout);
    assert!(status.stdout.contains(SHOWN), "{}", status.stdout);

    // A failure message of a result that has only status and message.
    let env = Env::new();
    let file = faulty_campaign(&env, "ansifail", 2, 1);
    let r = env.tarn(&["run", file.to_str().unwrap()]);
    r.code(1);
    assert_no_control_characters("run's stderr", &r.stderr);
    assert!(
        r.stderr.contains(&format!(
            "task r0002.walk.w000: out/result.json: status: the worker reported failure: no convergence {SHOWN}in 50 steps"
        )),
        "{}",
        r.stderr
    );

    // A metric name, in the rounds table.
    let env = Env::new();
    let file = faulty_campaign(&env, "ansimetric", 1, 1);
    env.tarn(&["run", file.to_str().unwrap()]).code(0);
    let rounds = env.tarn(&["rounds", "faults"]);
    rounds.code(0);
    assert_no_control_characters("rounds", &rounds.stdout);
    assert!(
        rounds.stdout.contains(&format!("accept{SHOWN}")),
        "{}",
        rounds.stdout
    );
}

#[test]
fn a_failed_result_with_only_status_and_message_shows_the_message() {
    let env = Env::new();
    let file = faulty_campaign(&env, "failed", 2, 1);
    let r = env.tarn(&["run", file.to_str().unwrap(), "--quiet"]);
    r.code(1);
    assert!(
        r.stderr.contains("task r0002.walk.w000: out/result.json: status: the worker reported failure: no convergence in 50 steps"),
        "{}",
        r.stderr
    );
}

#[test]
fn a_result_with_too_many_metrics_is_refused_naming_the_file_and_the_limit() {
    let env = Env::new();
    let file = faulty_campaign(&env, "metrics", 2, 1);
    let r = env.tarn(&["run", file.to_str().unwrap(), "--quiet"]);
    r.code(1);
    assert!(
        r.stderr.contains("task r0002.walk.w000: out/result.json: metrics: 1001 metrics exceed the limit of 1000 per result"),
        "{}",
        r.stderr
    );
}

/// Runs a hint's command line (`tarn ...`) through `sh`, with the tarn under test and
/// without `TARN_STATE`, so that only what the line says picks the campaign.
fn run_hint(env: &Env, line: &str) -> std::process::Output {
    let rest = line.strip_prefix("tarn ").expect("a tarn command");
    let script = format!("exec \"$TARN_BIN\" {rest}");
    std::process::Command::new("sh")
        .args(["-c", &script])
        .env("TARN_BIN", env!("CARGO_BIN_EXE_tarn"))
        .env_remove("TARN_STATE")
        .current_dir(env.path())
        .stdin(Stdio::null())
        .output()
        .expect("sh")
}

/// The first command in backquotes after `marker` in `text`.
fn quoted_command_after<'a>(text: &'a str, marker: &str) -> &'a str {
    let rest = &text[text
        .find(marker)
        .unwrap_or_else(|| panic!("no '{marker}' in {text}"))
        + marker.len()..];
    let start = rest.find('`').expect("a quoted command") + 1;
    let end = start + rest[start..].find('`').expect("closing quote");
    &rest[start..end]
}

#[test]
fn check_prints_shell_quoted_commands_that_run_the_same_arguments() {
    let env = Env::new();
    let command = r#""printf", "%s|", "a b", "it's", "$HOME", "x;y""#;
    let file = env.write("q.toml", &walk_campaign("quoted", 1, command, "", 1, ""));
    let r = env.tarn(&["check", file.to_str().unwrap()]);
    r.code(0);
    let line = r
        .stdout
        .lines()
        .find(|l| l.trim_start().starts_with("walk "))
        .expect("the walk stage's command");
    let pasted = line.trim_start().trim_start_matches("walk").trim();
    assert_eq!(pasted, r#"printf '%s|' 'a b' 'it'\''s' '$HOME' 'x;y'"#);
    let out = std::process::Command::new("sh")
        .args(["-c", pasted])
        .output()
        .expect("sh");
    assert_eq!(String::from_utf8_lossy(&out.stdout), "a b|it's|$HOME|x;y|");
}

#[test]
fn check_lists_the_external_energy_program() {
    let env = Env::new();
    let server = repo().join("examples/external-energy/muller_brown_server.py");
    let text = std::fs::read_to_string(repo().join("examples/external-energy/campaign.toml"))
        .unwrap()
        .replace("muller_brown_server.py", server.to_str().unwrap());
    let file = env.write("ext.toml", &text);
    let r = env.tarn(&["check", file.to_str().unwrap()]);
    r.code(0);
    let want = format!("    energy         python3 {}", server.display());
    assert!(r.stdout.contains(&want), "{}", r.stdout);
    assert!(
        r.stdout.contains("(the external energy program"),
        "{}",
        r.stdout
    );
}

#[test]
fn a_command_that_cannot_run_is_refused_by_check_and_run() {
    let env = Env::new();
    let file = env.write(
        "m.toml",
        &walk_campaign("missing", 1, r#""no-such-program-tarn", "x""#, "", 1, ""),
    );
    let want = "explore[0].command: program 'no-such-program-tarn' is not found on PATH";
    for args in [&["check"][..], &["run", "--quiet"][..]] {
        let mut a = args.to_vec();
        a.insert(1, file.to_str().unwrap());
        let r = env.tarn(&a);
        r.code(2);
        assert!(r.stderr.contains(want), "{args:?}: {}", r.stderr);
    }
    assert!(
        !env.state().join("missing").exists(),
        "a refused run creates no store"
    );
}

#[test]
fn the_hint_after_a_failure_names_the_state_directory_and_a_command_that_works() {
    let env = Env::new();
    let file = faulty_campaign(&env, "exit", 2, 1);
    let r = env.tarn(&["run", file.to_str().unwrap(), "--quiet"]);
    r.code(1);
    let state = env.state();
    let resume = quoted_command_after(&r.stderr, "fix the worker, then continue with ");
    assert_eq!(
        resume,
        format!("tarn --state {} resume faults", state.display())
    );
    let run = quoted_command_after(
        &r.stderr,
        "if you fix the campaign file instead, continue with ",
    );
    assert_eq!(
        run,
        format!(
            "tarn --state {} run {} --accept-change",
            state.display(),
            file.display()
        )
    );
    // Fix the campaign file (the worker's mode file is named in it) and paste the line.
    let fixed = env.write("mode-ok.txt", "ok");
    let text = std::fs::read_to_string(&file).unwrap().replace(
        env.path().join("mode.txt").to_str().unwrap(),
        fixed.to_str().unwrap(),
    );
    std::fs::write(&file, text).unwrap();
    let out = run_hint(&env, run);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(env.json(&["rounds", "faults"]).as_array().unwrap().len(), 2);
}

#[test]
fn the_hint_after_an_interrupt_names_the_state_directory() {
    let env = Env::new();
    let file = faulty_campaign(&env, "slow", 2, 1);
    let child = env.spawn(&["run", file.to_str().unwrap()]);
    env.wait_running("faults", Duration::from_secs(20));
    signal(&child, 2);
    let r = wait_with_limit(child, Duration::from_secs(30));
    r.code(3);
    let resume = quoted_command_after(&r.stderr, "Continue with ");
    assert_eq!(
        resume,
        format!("tarn --state {} resume faults", env.state().display())
    );
    let out = run_hint(&env, resume);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn a_moved_campaign_directory_is_continued_from_its_new_place() {
    let env = Env::new();
    let old = env.path().join("project");
    std::fs::create_dir(&old).unwrap();
    std::fs::copy(
        repo().join("tests/workers/faulty.py"),
        old.join("faulty.py"),
    )
    .unwrap();
    std::fs::write(old.join("mode.txt"), "exit").unwrap();
    // Relative worker paths, resolved from the campaign file's directory.
    let executor = "[executor]\n[executor.retry]\nattempts = 1\n";
    let text = walk_campaign(
        "moved",
        4,
        r#""python3", "faulty.py", "mode.txt""#,
        "",
        3,
        executor,
    );
    std::fs::write(old.join("moved.toml"), &text).unwrap();
    let state = |dir: &std::path::Path| dir.join("state").display().to_string();
    let file = old.join("moved.toml");
    env.tarn(&[
        "--state",
        &state(&old),
        "run",
        file.to_str().unwrap(),
        "--quiet",
    ])
    .code(1);

    let new = env.path().join("elsewhere");
    std::fs::rename(&old, &new).unwrap();
    std::fs::write(new.join("mode.txt"), "ok").unwrap();
    let r = env.tarn(&["--state", &state(&new), "resume", "moved", "--quiet"]);
    r.code(2);
    assert!(
        r.stderr.contains(&format!(
            "campaign 'moved' was last run from {}, which no longer exists (moved?)",
            old.display()
        )) && r
            .stderr
            .contains(&format!("`tarn --state {} run FILE`", state(&new))),
        "{}",
        r.stderr
    );
    let file = new.join("moved.toml");
    env.tarn(&[
        "--state",
        &state(&new),
        "run",
        file.to_str().unwrap(),
        "--quiet",
    ])
    .code(0);
    let rounds = env.json(&["--state", &state(&new), "rounds", "moved"]);
    assert_eq!(rounds.as_array().unwrap().len(), 3);
    // The store now knows the new place: resume works from there too.
    let more = text.replace("max_rounds = 3", "max_rounds = 4");
    std::fs::write(&file, more).unwrap();
    env.tarn(&[
        "--state",
        &state(&new),
        "run",
        file.to_str().unwrap(),
        "--accept-change",
        "--quiet",
    ])
    .code(0);
    assert_eq!(
        env.json(&["--state", &state(&new), "rounds", "moved"])
            .as_array()
            .unwrap()
            .len(),
        4
    );
}

#[test]
fn an_energy_program_that_dies_is_reported_with_its_stderr_log() {
    let env = Env::new();
    let server = env.write(
        "dies.py",
        "import sys\nprint('energy: cannot load the force field', file=sys.stderr)\nsys.exit(1)\n",
    );
    let text = std::fs::read_to_string(repo().join("examples/external-energy/campaign.toml"))
        .unwrap()
        .replace("muller_brown_server.py", server.to_str().unwrap())
        .replace("n_steps = 4000", "n_steps = 10")
        .replace("max_rounds = 3", "max_rounds = 1");
    let text = format!("{text}\n[executor]\n[executor.retry]\nattempts = 1\n");
    let file = env.write("dies.toml", &text);
    let r = env.tarn(&["run", file.to_str().unwrap(), "--quiet"]);
    r.code(1);
    let log = env
        .state()
        .join("piped-ridge/tasks/r0001/hot.w000/a1/stderr.log");
    assert!(
        r.stderr.contains(&format!(
            "the energy program's standard error is in {}",
            log.canonicalize().unwrap_or(log.clone()).display()
        )),
        "{}",
        r.stderr
    );
    let logged = std::fs::read_to_string(&log).unwrap();
    assert!(
        logged.contains("energy: cannot load the force field"),
        "{logged}"
    );
}
