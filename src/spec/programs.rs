//! Whether the programs a campaign starts exist and can be run.
//!
//! Owns: the check that every stage's `command` and an external model's
//! `system.command` name an executable file, resolved as tarn resolves them when it
//! starts a worker (a path with a `/` against the campaign file's directory when the
//! file is there, a bare name on `PATH`). Must not touch: processes (nothing is run).

use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};

use super::{span_of, Campaign, SpecError, Worker};
use crate::protocol::Role;

impl Campaign {
    /// Refuses a `command` whose program is not found or not executable, naming the key
    /// (`explore[0].command`) and pointing at the program in the file. `file` is the
    /// campaign file as shown in messages. `tarn check`, `run` and `resume` call this;
    /// the read commands, which start no program, do not. With the Slurm executor the
    /// programs run on compute nodes, whose `PATH` and files this machine cannot see, so
    /// nothing is checked here.
    pub fn check_programs(&self, file: &str) -> Result<(), SpecError> {
        if self.executor.slurm.is_some() {
            return Ok(());
        }
        let doc = toml_edit::ImDocument::parse(self.source.clone()).ok();
        for (key, argv) in self.program_commands() {
            if let Err(problem) = program_problem(&argv, &self.base_dir) {
                let span = doc.as_ref().and_then(|d| span_of(d, &format!("{key}[0]")));
                return Err(SpecError::at(file, &self.source, &key, span, problem));
            }
        }
        Ok(())
    }

    /// Every user command with its key path: the stages' `command` arrays and the
    /// external model's `system.command`, as written in the file.
    fn program_commands(&self) -> Vec<(String, Vec<String>)> {
        let mut out = Vec::new();
        let mut explore_index = 0;
        for stage in self.stages() {
            let key = if stage.role == Role::Explore {
                explore_index += 1;
                format!("explore[{}].command", explore_index - 1)
            } else {
                format!("{}.command", stage.role.as_str())
            };
            if let Worker::Command(argv) = &stage.worker {
                out.push((key, argv.clone()));
            }
        }
        let system: Option<Vec<String>> = self
            .system
            .table
            .get("command")
            .and_then(|c| c.as_array())
            .map(|a| {
                a.iter()
                    .filter_map(|v| v.as_str().map(String::from))
                    .collect()
            });
        if let Some(argv) = system.filter(|a| !a.is_empty()) {
            out.push(("system.command".into(), argv));
        }
        out
    }
}

/// What is wrong with the program of `argv`, resolved from `base` as the engine
/// resolves it (`engine::resolve_command`), or `Ok` when it is an executable file.
fn program_problem(argv: &[String], base: &Path) -> Result<(), String> {
    let (program, _) =
        crate::engine::resolve_command(&Worker::Command(argv.to_vec()), Path::new(""), base);
    let named = &argv[0];
    if !named.contains('/') {
        return match search_path(named) {
            Search::Found => Ok(()),
            Search::NotExecutable(p) => Err(format!(
                "program '{named}' is found on PATH at {} but is not executable",
                p.display()
            )),
            Search::Missing if base.join(named).is_file() => Err(format!(
                "program '{named}' is not found on PATH; for the file next to the campaign file write \"./{named}\""
            )),
            Search::Missing => Err(format!(
                "program '{named}' is not found on PATH (give its path, or install it)"
            )),
        };
    }
    if program.is_relative() {
        return Err(format!(
            "program '{named}' does not exist: a relative path is looked up in the campaign file's directory ({})",
            base.join(named).display()
        ));
    }
    let meta = std::fs::metadata(&program).map_err(|e| match e.kind() {
        std::io::ErrorKind::NotFound => format!("program '{}' does not exist", program.display()),
        _ => format!("program '{}' cannot be used: {e}", program.display()),
    })?;
    if !meta.is_file() {
        return Err(format!("program '{}' is not a file", program.display()));
    }
    if meta.permissions().mode() & 0o111 == 0 {
        return Err(format!(
            "program '{}' is not executable (make it so with chmod +x, or name its interpreter first, e.g. [\"python3\", \"{named}\"])",
            program.display()
        ));
    }
    Ok(())
}

/// The outcome of looking a bare program name up on `PATH`.
enum Search {
    Found,
    NotExecutable(PathBuf),
    Missing,
}

/// Looks `name` up on `PATH` as `execvp` does: the first executable file wins.
fn search_path(name: &str) -> Search {
    let mut not_executable = None;
    let path = std::env::var_os("PATH").unwrap_or_default();
    for dir in std::env::split_paths(&path) {
        let candidate = dir.join(name);
        let Ok(meta) = std::fs::metadata(&candidate) else {
            continue;
        };
        if !meta.is_file() {
            continue;
        }
        if meta.permissions().mode() & 0o111 != 0 {
            return Search::Found;
        }
        not_executable.get_or_insert(candidate);
    }
    match not_executable {
        Some(p) => Search::NotExecutable(p),
        None => Search::Missing,
    }
}
