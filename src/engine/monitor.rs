//! The engine's observers: one closed set of events, rendered as a progress view on a
//! terminal or plain lines elsewhere, logged through `tracing`, and folded into the
//! status snapshot.
//!
//! Owns: presentation of a running campaign. Must not touch: the store, processes.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use indicatif::{MultiProgress, ProgressBar, ProgressDrawTarget, ProgressStyle};

use super::snapshot::{self, Snapshot};
use crate::store::now_unix;

/// Everything the engine tells its observers.
#[derive(Debug, Clone)]
pub enum Event {
    RoundStarted {
        round: u32,
        tasks: u32,
    },
    StageStarted {
        round: u32,
        stage: String,
        tasks: u32,
    },
    TaskStarted {
        id: String,
        attempt: u32,
    },
    AttemptFailed {
        id: String,
        attempt: u32,
        error: String,
        retry_in: Option<f64>,
    },
    TaskDone {
        id: String,
        energy_evals: u64,
        skipped: bool,
    },
    RoundDone {
        round: u32,
        new_states: u32,
        states: u32,
        /// This round's energy evaluations.
        energy_evals: u64,
        /// Every round's so far, this one included.
        cumulative_energy_evals: u64,
    },
    StopRequested {
        hard: bool,
    },
    Finished {
        reason: String,
    },
    Failed {
        message: String,
    },
    Interrupted,
}

/// Renders events and keeps the snapshot.
pub struct Monitor {
    inner: Arc<Mutex<Inner>>,
    snapshot_dir: PathBuf,
    /// When the snapshot was last written; task-level events within
    /// [`PUBLISH_EVERY`] of it only mark it stale, and a background thread writes it.
    last_publish: Arc<Mutex<(Instant, bool)>>,
}

/// Task-level events are folded into the snapshot at most this often (round-level and
/// final events are written at once), so that short tasks do not pay for a file write
/// each.
const PUBLISH_EVERY: Duration = Duration::from_millis(100);

struct Inner {
    snap: Snapshot,
    bars: Option<Bars>,
    quiet: bool,
}

struct Bars {
    multi: MultiProgress,
    round: ProgressBar,
    stage: Option<ProgressBar>,
}

impl Monitor {
    /// A monitor for a campaign directory; progress bars only on a terminal.
    pub fn new(dir: PathBuf, mut snap: Snapshot, quiet: bool) -> Self {
        snap.phase = "running".into();
        snap.updated_unix = now_unix();
        let bars = (!quiet && std::io::stderr().is_terminal()).then(|| {
            let multi = MultiProgress::with_draw_target(ProgressDrawTarget::stderr());
            let round = multi.add(round_bar(snap.max_rounds));
            round.set_position(u64::from(snap.rounds_done));
            Bars {
                multi,
                round,
                stage: None,
            }
        });
        let m = Monitor {
            inner: Arc::new(Mutex::new(Inner { snap, bars, quiet })),
            snapshot_dir: dir,
            last_publish: Arc::new(Mutex::new((Instant::now(), false))),
        };
        m.publish();
        m.start_flusher();
        m
    }

    /// Writes a stale snapshot every [`PUBLISH_EVERY`]; ends when the monitor is dropped.
    fn start_flusher(&self) {
        let inner = Arc::downgrade(&self.inner);
        let last = Arc::downgrade(&self.last_publish);
        let dir = self.snapshot_dir.clone();
        std::thread::spawn(move || loop {
            std::thread::sleep(PUBLISH_EVERY);
            let (Some(inner), Some(last)) = (inner.upgrade(), last.upgrade()) else {
                return;
            };
            let stale = std::mem::replace(&mut last.lock().expect("publish lock").1, false);
            if stale {
                let snap = inner.lock().expect("monitor lock").snap.clone();
                let _ = snapshot::write_json(&snapshot::path(&dir), &snap);
            }
        });
    }

    /// Prints a line above the progress view (or plainly).
    pub fn line(&self, text: &str) {
        let inner = self.inner.lock().expect("monitor lock");
        if inner.quiet {
            return;
        }
        // Lines quote workers' errors and stderr: no control character reaches the
        // terminal raw.
        let text = crate::out::visible(text);
        match &inner.bars {
            Some(b) => b.multi.suspend(|| eprintln!("{text}")),
            None => eprintln!("{text}"),
        }
    }

    /// Prints a question for the user above the progress view, even with `--quiet`
    /// (a question the user cannot see cannot be answered).
    pub fn ask(&self, text: &str) {
        let inner = self.inner.lock().expect("monitor lock");
        match &inner.bars {
            Some(b) => b.multi.suspend(|| eprintln!("{text}")),
            None => eprintln!("{text}"),
        }
    }

    /// Records an event: log, render, snapshot.
    pub fn emit(&self, event: Event) {
        let text = self.apply(&event);
        if let Some(t) = text {
            self.line(&t);
        }
        let task_level = matches!(event, Event::TaskStarted { .. } | Event::TaskDone { .. });
        let recent = self.last_publish.lock().expect("publish lock").0.elapsed() < PUBLISH_EVERY;
        if task_level && recent {
            self.last_publish.lock().expect("publish lock").1 = true;
        } else {
            self.publish();
        }
    }

    fn apply(&self, event: &Event) -> Option<String> {
        let mut guard = self.inner.lock().expect("monitor lock");
        let inner = &mut *guard;
        let plain = inner.bars.is_none();
        let snap = &mut inner.snap;
        snap.updated_unix = now_unix();
        let text = match event {
            Event::RoundStarted { round, tasks } => {
                snap.round = *round;
                snap.tasks_this_round = *tasks;
                snap.tasks_done_this_round = 0;
                tracing::info!(round, tasks, "round started");
                plain.then(|| format!("round {round}: {tasks} tasks"))
            }
            Event::StageStarted {
                round,
                stage,
                tasks,
            } => {
                snap.stage = stage.clone();
                tracing::info!(round, stage = %stage, tasks, "stage started");
                if let Some(b) = inner.bars.as_mut() {
                    if let Some(old) = b.stage.take() {
                        old.finish_and_clear();
                    }
                    b.stage = Some(b.multi.add(stage_bar(stage, *tasks)));
                    None
                } else {
                    Some(format!("round {round}: stage {stage} ({tasks} tasks)"))
                }
            }
            Event::TaskStarted { id, attempt } => {
                snap.tasks_running.push(id.clone());
                tracing::debug!(task = %id, attempt, "task started");
                None
            }
            Event::AttemptFailed {
                id,
                attempt,
                error,
                retry_in,
            } => {
                snap.tasks_running.retain(|t| t != id);
                tracing::warn!(task = %id, attempt, error = %error, "attempt failed");
                Some(match retry_in {
                    Some(s) => format!(
                        "task {id}: attempt {attempt} failed: {error}\n  retrying in {s:.1} s"
                    ),
                    None => format!("task {id}: attempt {attempt} failed: {error}"),
                })
            }
            Event::TaskDone {
                id,
                energy_evals,
                skipped,
            } => {
                snap.tasks_running.retain(|t| t != id);
                snap.tasks_done_this_round += 1;
                snap.energy_evals += energy_evals;
                tracing::info!(task = %id, energy_evals, skipped, "task done");
                if let Some(bar) = inner.bars.as_ref().and_then(|b| b.stage.as_ref()) {
                    bar.inc(1);
                    bar.set_message(id.clone());
                }
                None
            }
            Event::RoundDone {
                round,
                new_states,
                states,
                energy_evals,
                cumulative_energy_evals,
            } => {
                snap.rounds_done = *round;
                snap.states = *states;
                snap.energy_evals = *cumulative_energy_evals;
                tracing::info!(round, new_states, states, energy_evals, "round done");
                let msg = round_done_line(
                    *round,
                    *new_states,
                    *states,
                    *energy_evals,
                    *cumulative_energy_evals,
                );
                if let Some(b) = inner.bars.as_ref() {
                    b.round.set_position(u64::from(*round));
                    b.round.set_message(format!(
                        "{states} states, {cumulative_energy_evals} energy evaluations in all rounds"
                    ));
                }
                Some(msg)
            }
            Event::StopRequested { hard } => {
                snap.message = if *hard {
                    "ending running tasks now".into()
                } else {
                    "stopping after running tasks commit".into()
                };
                Some(if *hard {
                    "second interrupt: ending running workers now; the campaign stays resumable"
                        .to_string()
                } else {
                    "interrupt: finishing the running tasks, then stopping (press Ctrl-C again to end them now)".to_string()
                })
            }
            Event::Finished { reason } => {
                snap.phase = "finished".into();
                snap.message = reason.clone();
                snap.tasks_running.clear();
                tracing::info!(reason = %reason, "campaign finished");
                None
            }
            Event::Failed { message } => {
                snap.phase = "failed".into();
                snap.message = message.clone();
                snap.tasks_running.clear();
                tracing::error!(message = %message, "campaign failed");
                None
            }
            Event::Interrupted => {
                snap.phase = "interrupted".into();
                snap.tasks_running.clear();
                tracing::warn!("campaign interrupted");
                None
            }
        };
        if matches!(
            event,
            Event::Finished { .. } | Event::Failed { .. } | Event::Interrupted
        ) {
            if let Some(b) = inner.bars.take() {
                if let Some(s) = b.stage {
                    s.finish_and_clear();
                }
                b.round.finish_and_clear();
            }
        }
        text
    }

    fn publish(&self) {
        *self.last_publish.lock().expect("publish lock") = (Instant::now(), false);
        let snap = self.inner.lock().expect("monitor lock").snap.clone();
        if let Err(e) = snapshot::write_json(&snapshot::path(&self.snapshot_dir), &snap) {
            tracing::warn!(error = %e, "cannot write the status snapshot");
        }
    }
}

/// The campaign's bar: rounds done of the limit, the time since this run started, and
/// (as its message) the catalogue's size and the evaluations of all rounds.
fn round_bar(max_rounds: u32) -> ProgressBar {
    let bar = ProgressBar::new(u64::from(max_rounds));
    bar.set_style(
        ProgressStyle::with_template(
            "{prefix:>8} [{bar:30}] {pos}/{len} rounds  {elapsed_precise} elapsed  {msg}",
        )
        .expect("template")
        .progress_chars("=> "),
    );
    bar.set_prefix("campaign");
    bar
}

/// A stage's bar, labelled with the stage's whole name: `{prefix:>8}` pads a short name
/// and never cuts a long one (`local+langevin` once showed as `local+la`).
fn stage_bar(stage: &str, tasks: u32) -> ProgressBar {
    let bar = ProgressBar::new(u64::from(tasks));
    bar.set_style(
        ProgressStyle::with_template("{prefix:>8} [{bar:30}] {pos}/{len} tasks  {msg}")
            .expect("template")
            .progress_chars("=> "),
    );
    bar.set_prefix(stage.to_string());
    bar
}

/// The line printed when a round is done; it says which evaluation count is the
/// round's and which the campaign's.
fn round_done_line(
    round: u32,
    new_states: u32,
    states: u32,
    evals: u64,
    cumulative: u64,
) -> String {
    format!(
        "round {round} done: {new_states} new states, {states} in the catalogue, {evals} energy evaluations this round ({cumulative} in all rounds)"
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_round_line_says_which_evaluation_count_is_which() {
        assert_eq!(
            round_done_line(3, 1, 4, 600, 1800),
            "round 3 done: 1 new states, 4 in the catalogue, 600 energy evaluations this round (1800 in all rounds)"
        );
    }

    /// A terminal that keeps what is written to it.
    #[derive(Debug, Default, Clone)]
    struct Screen(Arc<Mutex<String>>);

    impl indicatif::TermLike for Screen {
        fn width(&self) -> u16 {
            120
        }
        fn move_cursor_up(&self, _: usize) -> std::io::Result<()> {
            Ok(())
        }
        fn move_cursor_down(&self, _: usize) -> std::io::Result<()> {
            Ok(())
        }
        fn move_cursor_right(&self, _: usize) -> std::io::Result<()> {
            Ok(())
        }
        fn move_cursor_left(&self, _: usize) -> std::io::Result<()> {
            Ok(())
        }
        fn write_line(&self, s: &str) -> std::io::Result<()> {
            self.write_str(&format!("{s}\n"))
        }
        fn write_str(&self, s: &str) -> std::io::Result<()> {
            self.0.lock().expect("screen").push_str(s);
            Ok(())
        }
        fn clear_line(&self) -> std::io::Result<()> {
            Ok(())
        }
        fn flush(&self) -> std::io::Result<()> {
            Ok(())
        }
    }

    /// What `bar` draws on a 120-column terminal.
    fn drawn(bar: ProgressBar) -> String {
        let screen = Screen::default();
        bar.set_draw_target(ProgressDrawTarget::term_like(Box::new(screen.clone())));
        bar.inc(1);
        bar.tick();
        let text = screen.0.lock().expect("screen").clone();
        text
    }

    #[test]
    fn a_long_stage_name_is_not_cut_in_the_progress_view() {
        let text = drawn(stage_bar("local+langevin", 3));
        assert!(text.contains("local+langevin [="), "{text:?}");
        let text = drawn(stage_bar("walk", 3));
        assert!(text.contains("    walk [="), "{text:?}");
    }

    #[test]
    fn the_campaign_bar_shows_the_elapsed_time() {
        let text = drawn(round_bar(10));
        assert!(text.contains("1/10 rounds  00:00:00 elapsed"), "{text:?}");
    }
}
