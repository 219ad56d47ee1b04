//! Table-driven tests of broken campaign files and their exact messages.

use super::*;

const GOOD: &str = r#"name = "t1"
seed = 7
kT = 1.0

[system]
model = "muller-brown"

[start]
points = [[0.0, 0.0]]

[[explore]]
name = "hot"
kind = "hold"
walkers = 2

[dedup]
kind = "quench"
"#;

fn parse(text: &str) -> Result<Campaign, SpecError> {
    Campaign::parse("c.toml", text, Path::new("."))
}

#[test]
fn the_good_file_parses_with_its_defaults() {
    let c = parse(GOOD).unwrap();
    assert_eq!(c.name, "t1");
    assert_eq!(c.system.dim, 2);
    assert_eq!(c.explore[0].walkers, 2);
    assert_eq!(c.dedup.name, "dedup");
    assert_eq!(c.stop.max_rounds, 10);
    assert_eq!(c.executor.retry.attempts, 3);
    assert_eq!(c.stages().len(), 2);
    assert_eq!(c.stop.pooled_max_error, None);
    let with_rule = format!("{GOOD}\n[stop]\npooled_max_error = 0.2\n");
    assert_eq!(parse(&with_rule).unwrap().stop.pooled_max_error, Some(0.2));
}

#[test]
fn broken_files_get_exact_messages() {
    // (replace this, with that, expected message)
    let table: &[(&str, &str, &str)] = &[
        (
            "walkers = 2",
            "walkers = 0",
            "c.toml:14:11: explore[0].walkers: must be at least 1\n   |\n14 | walkers = 0\n   |           ^",
        ),
        (
            "walkers = 2",
            "walker = 2",
            "c.toml:14:1: explore[0].walker: unknown field `walker`, expected one of `name`, `kind`, `command`, `walkers`, `restart`, `timeout_seconds`, `pool_limit`, `params`, `slurm`; did you mean `walkers`?\n   |\n14 | walker = 2\n   | ^^^^^^",
        ),
        (
            "walkers = 2",
            "\"\" = 2",
            "c.toml:14:1: explore[0].\"\": unknown field `\"\"` (an empty key), expected one of `name`, `kind`, `command`, `walkers`, `restart`, `timeout_seconds`, `pool_limit`, `params`, `slurm`\n   |\n14 | \"\" = 2\n   | ^^",
        ),
        (
            "kT = 1.0",
            "kT = -1.0",
            "c.toml:3:6: kT: must be a positive number (the temperature in the system's energy unit)\n  |\n3 | kT = -1.0\n  |      ^^^^",
        ),
        (
            "kT = 1.0",
            "kT = \"hot\"",
            "c.toml:3:6: kT: invalid type: string \"hot\", expected f64\n  |\n3 | kT = \"hot\"\n  |      ^^^^^",
        ),
        (
            "kind = \"hold\"",
            "kind = \"hmc\"",
            "c.toml:13:8: explore[0].kind: 'hmc' is not a built-in explore kind (choose one of: hold, metropolis, langevin, metadynamics, latent-metropolis, generate)\n   |\n13 | kind = \"hmc\"\n   |        ^^^^^",
        ),
        (
            "points = [[0.0, 0.0]]",
            "points = [[0.0, 0.0, 1.0]]",
            "c.toml:9:11: start.points[0]: has 3 coordinates, but the system has dimension 2\n  |\n9 | points = [[0.0, 0.0, 1.0]]\n  |           ^^^^^^^^^^^^^^^",
        ),
        (
            "name = \"t1\"",
            "name = \"my campaign\"",
            "c.toml:1:8: name: 'my campaign' is not a valid name: use 1 to 64 letters, digits, '-' or '_', starting with a letter or digit\n  |\n1 | name = \"my campaign\"\n  |        ^^^^^^^^^^^^^",
        ),
        (
            "seed = 7",
            "seed = 7\nseed = 8",
            "c.toml:3:1: TOML syntax error: duplicate key `seed` in document root\n  |\n3 | seed = 8\n  | ^",
        ),
        (
            "[dedup]\nkind = \"quench\"",
            "[dedup]\ncommand = []",
            "c.toml:17:11: dedup.command: must name a program: [\"program\", \"arg\", ...]\n   |\n17 | command = []\n   |           ^^",
        ),
        (
            "[dedup]\nkind = \"quench\"",
            "[dedup]\nkind = \"quench\"\n\n[stop]\npooled_max_error = 0.0",
            "c.toml:20:20: stop.pooled_max_error: must be a positive number of kT\n   |\n20 | pooled_max_error = 0.0\n   |                    ^^^",
        ),
        (
            "[dedup]\nkind = \"quench\"",
            "[dedup]\nkind = \"quench\"\nwalkers = 2",
            "c.toml:18:11: dedup.walkers: only explore stages have walkers; a dedup stage runs as one task\n   |\n18 | walkers = 2\n   |           ^",
        ),
        (
            "model = \"muller-brown\"",
            "model = \"lennard-jones\"\nparticles = 1\ndims = 2",
            "c.toml:5:1: system: invalid parameter `particles`: a cluster needs at least 2 particles\n  |\n5 | [system]\n  | ^^^^^^^^",
        ),
        (
            "name = \"hot\"",
            "name = \"dedup\"",
            "c.toml:16:1: dedup.name: stage name 'dedup' (this stage's default name) is used twice; give each stage its own name\n   |\n16 | [dedup]\n   | ^^^^^^^",
        ),
        // Errors inside a stage's params point at the key's own line.
        (
            "kind = \"hold\"\nwalkers = 2",
            "kind = \"langevin\"\nwalkers = 2\n[explore.params]\ndt = 0.01\nn_step = 10",
            "c.toml:17:1: explore[0].params.n_step: langevin: unknown field `n_step`, expected one of `n_steps`, `dt`, `friction`, `save_stride`, `temperature_factor`; did you mean `n_steps`?\n   |\n17 | n_step = 10\n   | ^^^^^^",
        ),
        (
            "kind = \"hold\"\nwalkers = 2",
            "kind = \"langevin\"\nwalkers = 2\n[explore.params]\ncolour = 1",
            "c.toml:16:1: explore[0].params.colour: langevin: unknown field `colour`, expected one of `n_steps`, `dt`, `friction`, `save_stride`, `temperature_factor`\n   |\n16 | colour = 1\n   | ^^^^^^",
        ),
        (
            "kind = \"hold\"\nwalkers = 2",
            "kind = \"langevin\"\nwalkers = 2\n[explore.params]\nn_steps = 10\ndt = -1.0",
            "c.toml:17:6: explore[0].params.dt: langevin: invalid parameter `dt`: must be positive\n   |\n17 | dt = -1.0\n   |      ^^^^",
        ),
        (
            "kind = \"hold\"\nwalkers = 2",
            "kind = \"metropolis\"\nwalkers = 2\n[explore.params]\nn_steps = \"lots\"",
            "c.toml:16:11: explore[0].params.n_steps: metropolis: n_steps: invalid type: string \"lots\", expected u64\n   |\n16 | n_steps = \"lots\"\n   |           ^^^^^^",
        ),
        (
            "[dedup]\nkind = \"quench\"",
            "[dedup]\nkind = \"quench\"\n[dedup.params]\nenergy_tolerence = 1e-6",
            "c.toml:19:1: dedup.params.energy_tolerence: quench: unknown field `energy_tolerence`, expected one of `force_tolerance`, `max_steps`, `energy_tolerance`, `fingerprint_tolerance`, `max_per_state`, `fingerprint`, `dt_start`, `dt_max`, `max_step`; did you mean `energy_tolerance`?\n   |\n19 | energy_tolerence = 1e-6\n   | ^^^^^^^^^^^^^^^^",
        ),
    ];
    let mut wrong = Vec::new();
    for (i, (from, to, want)) in table.iter().enumerate() {
        assert!(
            GOOD.contains(from),
            "row {i}: the good file has no '{from}'"
        );
        let text = GOOD.replacen(from, to, 1);
        let got = parse(&text)
            .err()
            .unwrap_or_else(|| panic!("row {i}: expected an error"));
        if got.to_string() != *want {
            wrong.push(format!(
                "row {i}:\n got: {:?}\nwant: {want:?}",
                got.to_string()
            ));
        }
    }
    assert!(wrong.is_empty(), "{}", wrong.join("\n"));
}

#[test]
fn missing_sections_and_executor_limits_are_named() {
    let no_dedup = GOOD.replace("[dedup]\nkind = \"quench\"\n", "");
    assert!(parse(&no_dedup)
        .unwrap_err()
        .to_string()
        .contains("missing field `dedup`"));
    let bad_exec = format!("{GOOD}\n[executor]\nmax_parallel = 0\n");
    assert!(parse(&bad_exec)
        .unwrap_err()
        .to_string()
        .contains("executor.max_parallel: must be between 1 and 1024"));
    let bad_retry = format!("{GOOD}\n[executor.retry]\nbackoff = \"random\"\n");
    assert!(parse(&bad_retry)
        .unwrap_err()
        .to_string()
        .contains("executor.retry.backoff: 'random' is not one of: exponential, fixed"));
}

#[test]
fn built_in_params_are_checked_before_anything_runs() {
    let typo = GOOD.replace(
        "kind = \"hold\"\nwalkers = 2",
        "kind = \"langevin\"\nwalkers = 2\n[explore.params]\nn_step = 10",
    );
    let e = parse(&typo).unwrap_err().to_string();
    assert!(e.starts_with("c.toml:16:1: explore[0].params.n_step: langevin: unknown field `n_step`, expected one of `n_steps`"), "{e}");
    let range = GOOD.replace(
        "kind = \"hold\"\nwalkers = 2",
        "kind = \"langevin\"\nwalkers = 2\n[explore.params]\ndt = -1.0",
    );
    let e = parse(&range).unwrap_err().to_string();
    assert!(
        e.contains("explore[0].params.dt: langevin: invalid parameter `dt`: must be positive"),
        "{e}"
    );
    let wrong_type = GOOD.replace(
        "kind = \"hold\"\nwalkers = 2",
        "kind = \"metropolis\"\nwalkers = 2\n[explore.params]\nn_steps = \"lots\"",
    );
    let e = parse(&wrong_type).unwrap_err().to_string();
    assert!(
        e.contains(
            "explore[0].params.n_steps: metropolis: n_steps: invalid type: string \"lots\", expected u64"
        ),
        "{e}"
    );
    let hold = GOOD.replace("walkers = 2", "walkers = 2\n[explore.params]\nsteps = 3");
    assert!(parse(&hold)
        .unwrap_err()
        .to_string()
        .contains("the hold kind takes no params"));
}

#[test]
fn retry_delays_grow_are_capped_and_jitter_is_seeded() {
    let p = RetryPolicy {
        attempts: 5,
        backoff: Backoff::Exponential,
        initial: Duration::from_secs(1),
        max: Duration::from_secs(5),
        jitter: 0.0,
    };
    let d: Vec<f64> = (2..=6).map(|a| p.delay(a, 9).as_secs_f64()).collect();
    assert_eq!(d, vec![1.0, 2.0, 4.0, 5.0, 5.0]);
    let j = RetryPolicy { jitter: 0.5, ..p };
    assert_eq!(j.delay(3, 42), j.delay(3, 42));
    assert_ne!(j.delay(3, 42), j.delay(3, 43));
    let v = j.delay(3, 42).as_secs_f64();
    assert!((1.0..=3.0).contains(&v), "{v}");
}

#[test]
fn a_command_whose_program_cannot_run_is_refused_naming_its_key() {
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().expect("temp dir");
    let base = dir.path();
    std::fs::write(base.join("plain.py"), "print(1)\n").expect("write");
    std::fs::write(base.join("run.sh"), "#!/bin/sh\n").expect("write");
    std::fs::set_permissions(base.join("run.sh"), std::fs::Permissions::from_mode(0o755))
        .expect("chmod");
    let with_command = |cmd: &str| {
        GOOD.replace(
            "kind = \"hold\"\nwalkers = 2",
            &format!("command = {cmd}\nwalkers = 2"),
        )
    };
    let check = |cmd: &str| {
        let c = Campaign::parse("c.toml", &with_command(cmd), base).expect("parses");
        c.check_programs("c.toml").map_err(|e| e.to_string())
    };
    // Runnable: an interpreter on PATH, an executable file beside the campaign file.
    assert_eq!(check(r#"["python3", "plain.py"]"#), Ok(()));
    assert_eq!(check(r#"["./run.sh"]"#), Ok(()));
    let table: &[(&str, String)] = &[
        (
            r#"["no-such-program-tarn", "x"]"#,
            "c.toml:13:12: explore[0].command: program 'no-such-program-tarn' is not found on PATH (give its path, or install it)\n   |\n13 | command = [\"no-such-program-tarn\", \"x\"]\n   |            ^^^^^^^^^^^^^^^^^^^^^^".into(),
        ),
        (
            r#"["./plain.py"]"#,
            format!("c.toml:13:12: explore[0].command: program '{}' is not executable (make it so with chmod +x, or name its interpreter first, e.g. [\"python3\", \"./plain.py\"])\n   |\n13 | command = [\"./plain.py\"]\n   |            ^^^^^^^^^^^^", base.join("./plain.py").display()),
        ),
        (
            r#"["bin/missing"]"#,
            format!("c.toml:13:12: explore[0].command: program 'bin/missing' does not exist: a relative path is looked up in the campaign file's directory ({})\n   |\n13 | command = [\"bin/missing\"]\n   |            ^^^^^^^^^^^^^", base.join("bin/missing").display()),
        ),
        (
            r#"["plain.py"]"#,
            "c.toml:13:12: explore[0].command: program 'plain.py' is not found on PATH; for the file next to the campaign file write \"./plain.py\"\n   |\n13 | command = [\"plain.py\"]\n   |            ^^^^^^^^^^".into(),
        ),
    ];
    for (cmd, want) in table {
        assert_eq!(check(cmd).unwrap_err(), *want, "{cmd}");
    }
    // The dedup stage and an external model's program are checked too.
    let dedup = GOOD.replace(
        "[dedup]\nkind = \"quench\"",
        "[dedup]\ncommand = [\"/nonexistent/dedup\"]",
    );
    let e = Campaign::parse("c.toml", &dedup, base)
        .expect("parses")
        .check_programs("c.toml")
        .unwrap_err()
        .to_string();
    assert!(
        e.starts_with("c.toml:17:12: dedup.command: program '/nonexistent/dedup' does not exist\n"),
        "{e}"
    );
    let external = GOOD.replace(
        "model = \"muller-brown\"",
        "model = \"external\"\ncommand = [\"/nonexistent/energy\"]\ndim = 2",
    );
    let e = Campaign::parse("c.toml", &external, base)
        .expect("parses")
        .check_programs("c.toml")
        .unwrap_err()
        .to_string();
    assert!(
        e.starts_with(
            "c.toml:7:12: system.command: program '/nonexistent/energy' does not exist\n"
        ),
        "{e}"
    );
}
