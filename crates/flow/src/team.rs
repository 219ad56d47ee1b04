//! A small team of threads for the workspace's batch splitting: the calling thread runs
//! the first chunk itself and helper threads, which spin briefly between jobs before
//! they park, run the others.
//!
//! A thread pool that parks its workers between calls and parks the caller during one
//! costs two wake-ups per call; on a virtual machine that is tens of microseconds,
//! which for the small configuration (about 450 us of work per chunk) was 7-8% of every
//! sampling pass. Here a job starts when a helper sees a counter move, and the caller
//! spins for the helpers, which finish when it does. Which thread runs which chunk is
//! fixed (chunk i on helper i), so results never depend on scheduling.
//!
//! Owns: the helper threads and the hand-over of one job at a time. Must not touch:
//! what a job computes (the workspace's closures), the rayon pool.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::atomic::{AtomicBool, AtomicPtr, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

/// How long an idle helper spins before it parks: long enough to bridge the caller's
/// serial work between two batches (drawing the next latent rows, copying results).
const SPIN: Duration = Duration::from_micros(300);

/// A job: chunk index -> work. Borrowed from the caller's stack for one `run`.
type Job<'a> = &'a (dyn Fn(usize) + Sync);

/// What the caller and the helpers share.
struct Shared {
    /// Bumped (under `lock`) to hand the helpers a new job.
    generation: AtomicU64,
    /// The current job: a pointer to the caller's `Job` reference, valid until every
    /// helper has counted itself in `done`.
    job: AtomicPtr<()>,
    /// Helpers that have finished the current job (every helper counts itself, those
    /// the job does not use included, so that no helper is still reading one job's
    /// pointer when the next is handed out).
    done: AtomicUsize,
    /// How many helpers the current job uses (chunks beyond the first).
    active: AtomicUsize,
    panicked: AtomicBool,
    stop: AtomicBool,
    /// Parked helpers, counted under `lock`.
    lock: Mutex<usize>,
    wake: Condvar,
}

/// The helper threads; dropped, they finish and are joined.
pub(crate) struct Team {
    shared: Arc<Shared>,
    helpers: Vec<JoinHandle<()>>,
}

impl std::fmt::Debug for Team {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Team")
            .field("helpers", &self.helpers.len())
            .finish()
    }
}

impl Team {
    /// A team of the caller and `helpers` helper threads.
    pub(crate) fn new(helpers: usize) -> std::io::Result<Team> {
        let shared = Arc::new(Shared {
            generation: AtomicU64::new(0),
            job: AtomicPtr::new(std::ptr::null_mut()),
            done: AtomicUsize::new(0),
            active: AtomicUsize::new(0),
            panicked: AtomicBool::new(false),
            stop: AtomicBool::new(false),
            lock: Mutex::new(0),
            wake: Condvar::new(),
        });
        let mut handles = Vec::with_capacity(helpers);
        for i in 0..helpers {
            let s = Arc::clone(&shared);
            let spawned = std::thread::Builder::new()
                .name(format!("tarn-flow-{}", i + 1))
                .spawn(move || helper_loop(&s, i + 1));
            match spawned {
                Ok(h) => handles.push(h),
                Err(e) => {
                    // Let the ones already started go before reporting.
                    drop(Team {
                        shared,
                        helpers: handles,
                    });
                    return Err(e);
                }
            }
        }
        Ok(Team {
            shared,
            helpers: handles,
        })
    }

    /// Runs `job(0)` on the calling thread and `job(1)` .. `job(chunks - 1)` on helpers
    /// 1 .. chunks - 1, and returns when all have finished. A panic in a helper's chunk
    /// is raised here once every chunk has ended. (`&mut`: one job at a time.)
    pub(crate) fn run(&mut self, chunks: usize, job: Job) {
        let used = chunks.saturating_sub(1);
        assert!(
            used <= self.helpers.len(),
            "more chunks than the team has threads"
        );
        if used == 0 {
            if chunks == 1 {
                job(0);
            }
            return;
        }
        // Every helper finished the previous job (see `done`) before this one is set.
        let s = &*self.shared;
        s.job
            .store(&job as *const Job as *mut (), Ordering::Release);
        s.done.store(0, Ordering::Relaxed);
        s.active.store(used, Ordering::Relaxed);
        {
            let parked = s.lock.lock().unwrap_or_else(|e| e.into_inner());
            s.generation.fetch_add(1, Ordering::Release);
            if *parked > 0 {
                s.wake.notify_all();
            }
        }
        let mine = catch_unwind(AssertUnwindSafe(|| job(0)));
        // The job borrows this stack frame: wait for every helper even if ours panicked.
        let all = self.helpers.len();
        let mut spins = 0u32;
        while s.done.load(Ordering::Acquire) < all {
            spins = spins.wrapping_add(1);
            if spins.is_multiple_of(1024) {
                std::thread::yield_now();
            } else {
                std::hint::spin_loop();
            }
        }
        s.job.store(std::ptr::null_mut(), Ordering::Relaxed);
        if let Err(p) = mine {
            std::panic::resume_unwind(p);
        }
        if s.panicked.swap(false, Ordering::AcqRel) {
            panic!("a flow helper thread panicked");
        }
    }
}

impl Drop for Team {
    fn drop(&mut self) {
        {
            let _parked = self.shared.lock.lock().unwrap_or_else(|e| e.into_inner());
            self.shared.stop.store(true, Ordering::Release);
            self.shared.wake.notify_all();
        }
        for h in self.helpers.drain(..) {
            let _ = h.join();
        }
    }
}

/// A helper's life: wait for a new generation (spinning for `SPIN`, then parked), run
/// its chunk if the job uses it, count itself done.
fn helper_loop(s: &Shared, index: usize) {
    let mut seen = 0u64;
    loop {
        let started = Instant::now();
        let mut spins = 0u32;
        loop {
            if s.stop.load(Ordering::Acquire) {
                return;
            }
            let g = s.generation.load(Ordering::Acquire);
            if g != seen {
                seen = g;
                break;
            }
            spins = spins.wrapping_add(1);
            if !spins.is_multiple_of(256) || started.elapsed() < SPIN {
                std::hint::spin_loop();
                continue;
            }
            let mut parked = s.lock.lock().unwrap_or_else(|e| e.into_inner());
            *parked += 1;
            while s.generation.load(Ordering::Acquire) == seen && !s.stop.load(Ordering::Acquire) {
                parked = s.wake.wait(parked).unwrap_or_else(|e| e.into_inner());
            }
            *parked -= 1;
        }
        if index <= s.active.load(Ordering::Relaxed) {
            // SAFETY: the caller stored a pointer to its `Job` reference before bumping
            // the generation (Release/Acquire) and keeps it alive until every helper has
            // added itself to `done`.
            let job: Job = unsafe { *(s.job.load(Ordering::Acquire) as *const Job) };
            if catch_unwind(AssertUnwindSafe(|| job(index))).is_err() {
                s.panicked.store(true, Ordering::Release);
            }
        }
        s.done.fetch_add(1, Ordering::AcqRel);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::atomic::AtomicU32;

    #[test]
    fn every_chunk_runs_once_on_its_own_thread_call_after_call() {
        let mut team = Team::new(3).unwrap();
        for round in 0..2000u32 {
            let chunks = 1 + (round % 4) as usize;
            let hits: Vec<AtomicU32> = (0..4).map(|_| AtomicU32::new(0)).collect();
            let names: Vec<Mutex<String>> = (0..4).map(|_| Mutex::new(String::new())).collect();
            team.run(chunks, &|i| {
                hits[i].fetch_add(1, Ordering::Relaxed);
                *names[i].lock().unwrap() = std::thread::current().name().unwrap_or("").to_string();
            });
            for (i, h) in hits.iter().enumerate() {
                assert_eq!(
                    h.load(Ordering::Relaxed),
                    u32::from(i < chunks),
                    "round {round} chunk {i}"
                );
            }
            for (i, name) in names.iter().enumerate().take(chunks).skip(1) {
                assert_eq!(*name.lock().unwrap(), format!("tarn-flow-{i}"));
            }
            if round % 500 == 499 {
                // Long enough for the helpers to park: the next call must wake them.
                std::thread::sleep(Duration::from_millis(2));
            }
        }
    }

    #[test]
    fn a_panicking_chunk_is_raised_after_every_chunk_ended_and_the_team_goes_on() {
        let mut team = Team::new(1).unwrap();
        let finished = AtomicU32::new(0);
        let r = catch_unwind(AssertUnwindSafe(|| {
            team.run(2, &|i| {
                if i == 1 {
                    panic!("chunk 1 fails");
                }
                std::thread::sleep(Duration::from_millis(5));
                finished.fetch_add(1, Ordering::Relaxed);
            })
        }));
        assert!(r.is_err());
        assert_eq!(finished.load(Ordering::Relaxed), 1);
        let again = AtomicU32::new(0);
        team.run(2, &|_| {
            again.fetch_add(1, Ordering::Relaxed);
        });
        assert_eq!(again.load(Ordering::Relaxed), 2);
    }
}
