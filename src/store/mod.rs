//! The campaign store: one sled database per campaign, under `STATE/NAME/db`.
//!
//! Owns: keys, values, atomic batches, schema checks, and the publication of the status
//! snapshot file. Must not touch: processes, the worker protocol's files, the terminal.
//!
//! # Layout
//! One sled tree; every key starts with a one-byte prefix and continues big-endian, so
//! that iteration follows round order:
//!
//! | prefix | key | value |
//! | --- | --- | --- |
//! | `m` | `schema` / `meta` / `finished` | versioned JSON |
//! | `c` | version u32 | [`CampaignVersion`] |
//! | `e` | seq u64 | [`EventRecord`] |
//! | `r` | round u32 | [`RoundRecord`] |
//! | `t` | round u32, stage u16, walker u32 | [`TaskRecord`] |
//! | `a` | task key (10 bytes), name, 0, chunk u32 | blob: version byte, then bytes |
//! | `s` | state id u32 | [`StateRecord`] |
//! | `n` | round u32 | [`ModelRecord`] (bytes under the retrain task's `a` keys) |
//! | `j` | round u32, stage u16, walker u32 | [`jobs::JobRecord`] (an attempt out on Slurm) |
//!
//! Arrays are stored as `.npy` bytes cut into chunks of [`CHUNK`] bytes: a few large
//! values per task, not a key per sample. A task's outputs, its record, the states it
//! changes and its event go into one [`sled::Batch`], applied atomically and flushed
//! before the task counts as done.
//!
//! # Damage and read-only access
//! sled's recovery, run by every open, treats the first damaged record of its log as
//! the end of the log and cuts the store back to it. tarn therefore never lets sled
//! open a store it has not checked first: every commit also raises a commit counter
//! (key `mcommits`, in the same batch) and, once flushed, records that count in
//! [`COMMIT_FILE`] beside the database. Opening a store copies the database to a
//! private temporary directory, lets sled recover the copy, reads every record of it
//! and compares its counter with the recorded one; a store that lost a committed
//! batch, or whose records cannot be read, is refused with [`StoreError::Damaged`]
//! and the original files are left exactly as they were. Read commands
//! ([`Store::open_read_only`]) then work on that copy, so they never write to the
//! store at all; the engine ([`Store::open`]) opens the original once the copy passed.

pub mod jobs;
pub mod records;

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use serde::de::DeserializeOwned;
use serde::Serialize;
use sha2::{Digest, Sha256};

pub use records::*;

use crate::protocol::{npy, Array};

/// Size of one array chunk in the store.
pub const CHUNK: usize = 4 << 20;

/// sled's page cache cap. Its default (1 GiB) would let a long campaign's resident
/// memory grow with the store; 64 MiB keeps the engine small and is plenty for the
/// access pattern (a round's arrays are read once).
pub const CACHE_BYTES: u64 = 64 << 20;

/// How long a held lock on a store this process opened before is asked again before
/// the store counts as in use by another process (see `Store::probe_lock`).
const LOCK_WAIT: Duration = Duration::from_millis(1500);

/// The database directories this process has opened (see `Store::probe_lock`).
fn opened_here() -> std::sync::MutexGuard<'static, std::collections::BTreeSet<PathBuf>> {
    static OPENED: std::sync::Mutex<std::collections::BTreeSet<PathBuf>> =
        std::sync::Mutex::new(std::collections::BTreeSet::new());
    OPENED.lock().unwrap_or_else(|e| e.into_inner())
}

/// The file in the campaign directory, beside `db/`, where tarn records how many
/// batches it has committed and flushed (written through a temporary file and a
/// rename after every flush). It can only lag the store, never lead it: a store that
/// holds fewer commits than this file says has lost committed data.
pub const COMMIT_FILE: &str = "commits.json";

/// The store key of the commit counter, raised in every batch.
const COMMITS_KEY: &[u8] = b"mcommits";

/// Free space a commit must find beyond twice its own size: room for sled to start a
/// few new log segments (512 KiB each) and to write its snapshot.
pub const SPACE_MARGIN: u64 = 2 << 20;

/// Why the store could not do what was asked.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("store {path}: {source}")]
    Sled { path: String, source: sled::Error },
    #[error("store {path} is in use by another tarn process{holder}")]
    Locked { path: String, holder: String },
    #[error("store {path} has schema version {found}, but this tarn reads version {SCHEMA_VERSION}; use the tarn that wrote it")]
    Schema { path: String, found: u32 },
    #[error("store {path}: record {key} is unreadable ({detail}); the store may be damaged — it was not changed")]
    Corrupt {
        path: String,
        key: String,
        detail: String,
    },
    #[error("store {path} does not exist")]
    Missing { path: String },
    #[error("store {path}: {file} is damaged ({detail}); tarn refused to open the store and did not change it (sled's recovery would cut it back to the damage). Restore the campaign directory from a backup, or move it aside and start the campaign again")]
    Damaged {
        path: String,
        file: String,
        detail: String,
    },
    #[error("store {path}: No space left on device: a commit of {bytes} bytes needs {need} bytes free and {free} are; nothing was written. Free some space, then `tarn resume`")]
    NoSpace {
        path: String,
        bytes: u64,
        need: u64,
        free: u64,
    },
    #[error("store {path} was opened read-only (a private copy for a read command) and cannot be written")]
    ReadOnly { path: String },
}

/// An open campaign store.
pub struct Store {
    // Declared first so that it is dropped (closed) before `_copy` removes the files
    // of a read-only copy.
    db: sled::Db,
    dir: PathBuf,
    next_seq: AtomicU64,
    host: String,
    /// The commit counter as it stands in the database; guarded by `commit`.
    commits: AtomicU64,
    /// Serialises commits, so that the counter in the store rises with every batch in
    /// the order the batches are applied.
    commit: Mutex<()>,
    /// The private copy a read-only store works on (removed when the store drops).
    _copy: Option<CopyDir>,
}

/// A temporary directory holding a private copy of a database, removed on drop.
struct CopyDir(PathBuf);

impl Drop for CopyDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// Key builders; see the layout table in the module doc.
pub mod keys {
    /// The store's creation facts ([`super::Meta`]).
    pub fn meta() -> Vec<u8> {
        b"mmeta".to_vec()
    }
    pub fn round(r: u32) -> Vec<u8> {
        let mut k = vec![b'r'];
        k.extend_from_slice(&r.to_be_bytes());
        k
    }
    pub fn task_suffix(r: u32, stage: u16, walker: u32) -> [u8; 10] {
        let mut k = [0u8; 10];
        k[..4].copy_from_slice(&r.to_be_bytes());
        k[4..6].copy_from_slice(&stage.to_be_bytes());
        k[6..].copy_from_slice(&walker.to_be_bytes());
        k
    }
    pub fn task(r: u32, stage: u16, walker: u32) -> Vec<u8> {
        let mut k = vec![b't'];
        k.extend_from_slice(&task_suffix(r, stage, walker));
        k
    }
    pub fn round_tasks(r: u32) -> Vec<u8> {
        let mut k = vec![b't'];
        k.extend_from_slice(&r.to_be_bytes());
        k
    }
    pub fn array_prefix(task: &[u8; 10], name: &str) -> Vec<u8> {
        let mut k = vec![b'a'];
        k.extend_from_slice(task);
        k.extend_from_slice(name.as_bytes());
        k.push(0);
        k
    }
    pub fn state(id: u32) -> Vec<u8> {
        let mut k = vec![b's'];
        k.extend_from_slice(&id.to_be_bytes());
        k
    }
    pub fn model(r: u32) -> Vec<u8> {
        let mut k = vec![b'n'];
        k.extend_from_slice(&r.to_be_bytes());
        k
    }
    pub fn event(seq: u64) -> Vec<u8> {
        let mut k = vec![b'e'];
        k.extend_from_slice(&seq.to_be_bytes());
        k
    }
    pub fn campaign(i: u32) -> Vec<u8> {
        let mut k = vec![b'c'];
        k.extend_from_slice(&i.to_be_bytes());
        k
    }
}

/// Seconds since the Unix epoch.
pub fn now_unix() -> f64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_secs_f64())
        .unwrap_or(0.0)
}

/// This machine's host name.
pub fn host_name() -> String {
    nix::unistd::gethostname()
        .ok()
        .and_then(|h| h.into_string().ok())
        .unwrap_or_else(|| "unknown".into())
}

/// A set of writes applied atomically by [`Store::apply`].
#[derive(Default)]
pub struct Batch {
    inner: sled::Batch,
    events: Vec<(String, String)>,
    /// Bytes of the keys and values put so far (for the free-space check).
    bytes: u64,
}

impl Batch {
    /// Puts a versioned record.
    pub fn put<T: Serialize>(&mut self, key: Vec<u8>, value: &T) {
        let bytes = serde_json::to_vec(value).expect("records serialize");
        self.bytes += (key.len() + bytes.len()) as u64;
        self.inner.insert(key, bytes);
    }

    /// Puts an array under a task, as chunked `.npy` bytes.
    pub fn put_array(&mut self, task: &[u8; 10], name: &str, array: &Array) {
        self.put_blob(task, name, &npy::encode_f64(array));
    }

    /// Puts raw bytes under a task, chunked, each chunk led by the schema version byte.
    pub fn put_blob(&mut self, task: &[u8; 10], name: &str, bytes: &[u8]) {
        let prefix = keys::array_prefix(task, name);
        for (i, chunk) in bytes.chunks(CHUNK).enumerate() {
            let mut k = prefix.clone();
            k.extend_from_slice(&(i as u32).to_be_bytes());
            let mut v = Vec::with_capacity(chunk.len() + 1);
            v.push(SCHEMA_VERSION as u8);
            v.extend_from_slice(chunk);
            self.bytes += (k.len() + v.len()) as u64;
            self.inner.insert(k, v);
        }
        if bytes.is_empty() {
            let mut k = prefix;
            k.extend_from_slice(&0u32.to_be_bytes());
            self.inner.insert(k, vec![SCHEMA_VERSION as u8]);
        }
    }

    /// Appends an event to the log in the same atomic write.
    pub fn event(&mut self, kind: &str, message: impl Into<String>) {
        self.events.push((kind.to_string(), message.into()));
    }
}

impl Store {
    /// The database directory inside a campaign directory.
    fn db_path(dir: &Path) -> PathBuf {
        dir.join("db")
    }

    /// Whether a campaign directory holds a store.
    pub fn exists(dir: &Path) -> bool {
        Store::db_path(dir).join("conf").exists() || Store::db_path(dir).join("db").exists()
    }

    fn open_db(dir: &Path) -> Result<sled::Db, StoreError> {
        Store::open_db_at(&Store::db_path(dir), dir)
    }

    /// Opens the sled database at `path`; `dir` is the campaign directory whose
    /// holder a lock refusal names.
    fn open_db_at(path: &Path, dir: &Path) -> Result<sled::Db, StoreError> {
        opened_here().insert(path.to_path_buf());
        sled::Config::new()
            .path(path)
            .cache_capacity(CACHE_BYTES)
            .mode(sled::Mode::LowSpace)
            .open()
            .map_err(|e| match e {
                sled::Error::Io(ref io)
                    if io.kind() == std::io::ErrorKind::WouldBlock
                        || io.to_string().contains("lock") =>
                {
                    Store::locked(dir)
                }
                other => StoreError::Sled {
                    path: path.display().to_string(),
                    source: other,
                },
            })
    }

    fn locked(dir: &Path) -> StoreError {
        StoreError::Locked {
            path: Store::db_path(dir).display().to_string(),
            holder: crate::engine::snapshot::holder_text(dir),
        }
    }

    /// Refuses with [`StoreError::Locked`] when another process holds the database's
    /// lock (sled takes an exclusive `flock` on its `db` file). The probe takes and
    /// releases the same lock on a read-only handle, so it writes nothing. A store
    /// that this same process opened and closed a moment ago keeps its lock until
    /// sled's flusher thread has let go of the file, so for such a store a held lock
    /// is asked again for up to [`LOCK_WAIT`]; any other held lock is another process's
    /// and refused at once.
    fn probe_lock(dir: &Path) -> Result<(), StoreError> {
        use nix::fcntl::{Flock, FlockArg};
        let file = Store::db_path(dir).join("db");
        let ours = opened_here().contains(&Store::db_path(dir));
        let deadline = Instant::now() + if ours { LOCK_WAIT } else { Duration::ZERO };
        loop {
            let Ok(handle) = std::fs::File::open(&file) else {
                // No log file yet (or unreadable): sled's own open reports it.
                return Ok(());
            };
            match Flock::lock(handle, FlockArg::LockExclusiveNonblock) {
                Ok(lock) => {
                    drop(lock);
                    return Ok(());
                }
                Err((_, nix::errno::Errno::EWOULDBLOCK)) => {
                    if Instant::now() >= deadline {
                        return Err(Store::locked(dir));
                    }
                    std::thread::sleep(Duration::from_millis(20));
                }
                Err(_) => return Ok(()),
            }
        }
    }

    /// Creates a new store for a campaign; fails if one exists.
    pub fn create(dir: &Path, meta: &Meta, first: &CampaignVersion) -> Result<Store, StoreError> {
        std::fs::create_dir_all(dir).map_err(|e| StoreError::Sled {
            path: dir.display().to_string(),
            source: sled::Error::Io(e),
        })?;
        let db = Store::open_db(dir)?;
        let store = Store::wrap(db, dir, None)?;
        store.initialise(meta, first)?;
        Ok(store)
    }

    /// Opens the store of a campaign directory, creating it when it does not exist yet.
    /// An existing store goes through [`Store::open`] (checked before sled touches it).
    /// For a new one the lock is taken before anything is decided, so that two
    /// processes starting the same new campaign at once cannot both create it: the
    /// second one is refused as `Locked`. A database with no schema record and no other
    /// record (a creation cut short) is initialised; one with records but no schema is
    /// refused as damaged. Returns the store and whether it was created now.
    pub fn open_or_create(
        dir: &Path,
        meta: &Meta,
        first: &CampaignVersion,
    ) -> Result<(Store, bool), StoreError> {
        if Store::exists(dir) {
            return Store::open(dir).map(|s| (s, false));
        }
        std::fs::create_dir_all(dir).map_err(|e| StoreError::Sled {
            path: dir.display().to_string(),
            source: sled::Error::Io(e),
        })?;
        let db = Store::open_db(dir)?;
        let path = dir.display().to_string();
        let has_schema = db
            .get(b"mschema")
            .map_err(|e| StoreError::Sled {
                path: path.clone(),
                source: e,
            })?
            .is_some();
        if has_schema || !db.is_empty() {
            drop(db);
            return Store::open(dir).map(|s| (s, false));
        }
        let store = Store::wrap(db, dir, None)?;
        store.initialise(meta, first)?;
        Ok((store, true))
    }

    /// Writes the first records of a new store in one batch.
    fn initialise(&self, meta: &Meta, first: &CampaignVersion) -> Result<(), StoreError> {
        let mut b = Batch::default();
        b.inner
            .insert(b"mschema".to_vec(), SCHEMA_VERSION.to_be_bytes().to_vec());
        b.put(b"mmeta".to_vec(), meta);
        b.put(keys::campaign(0), first);
        b.event(
            "created",
            format!(
                "campaign {} created (file hash {})",
                meta.campaign,
                &first.hash[..first.hash.len().min(12)]
            ),
        );
        self.apply(b)
    }

    /// Opens an existing store for writing (the engine's open). The store is checked
    /// on a private copy first (see the module doc): a damaged store is refused before
    /// sled's recovery can cut it back, and one of another schema version is refused.
    pub fn open(dir: &Path) -> Result<Store, StoreError> {
        // The copy is checked and dropped; then the original is opened.
        drop(Store::open_read_only(dir)?);
        let db = Store::open_db(dir)?;
        Store::check_schema(&db, dir)?;
        let store = Store::wrap(db, dir, None)?;
        // The original recovers to what the copy recovered to; check the counter once
        // more in case the files changed in between (another tarn ran meanwhile).
        store.check_commits()?;
        Ok(store)
    }

    /// Opens an existing store for reading only, for the read commands (`status`,
    /// `rounds`, `states`, `export`, `report`, `digest`). The database is copied to a
    /// private temporary directory (`TMPDIR`) and the copy is opened, checked and read;
    /// the store's own files are never written, not even by sled's recovery. A store
    /// in use by a running campaign is refused as [`StoreError::Locked`] (its published
    /// snapshot files are the way to read it then). Writes to the returned store fail
    /// with [`StoreError::ReadOnly`].
    pub fn open_read_only(dir: &Path) -> Result<Store, StoreError> {
        if !Store::exists(dir) {
            return Err(StoreError::Missing {
                path: dir.display().to_string(),
            });
        }
        Store::probe_lock(dir)?;
        let copy = Store::copy_db(dir)?;
        // A campaign that started while the files were copied may have left the copy
        // torn between two of its writes: treat the store as in use, which it is.
        Store::probe_lock(dir)?;
        let path = Store::db_path(dir);
        let db = Store::open_db_at(&copy.0.join("db"), dir).map_err(|e| match e {
            StoreError::Sled { source, .. } => StoreError::Damaged {
                path: path.display().to_string(),
                file: path.join("db").display().to_string(),
                detail: match source {
                    sled::Error::Corruption { .. } => {
                        "sled's recovery found corrupted data in it".to_string()
                    }
                    other => format!("sled cannot recover it: {other}"),
                },
            },
            other => other,
        })?;
        Store::read_every_record(&db, dir)?;
        Store::check_schema(&db, dir)?;
        let store = Store::wrap(db, dir, Some(copy))?;
        store.check_commits()?;
        Ok(store)
    }

    /// Copies the database directory of `dir` to a new private temporary directory.
    fn copy_db(dir: &Path) -> Result<CopyDir, StoreError> {
        let io = |what: &Path, e: std::io::Error| StoreError::Sled {
            path: what.display().to_string(),
            source: sled::Error::Io(e),
        };
        Store::remove_stale_copies();
        static NEXT: AtomicU64 = AtomicU64::new(0);
        let nanos = SystemTime::now()
            .duration_since(UNIX_EPOCH)
            .map(|d| d.subsec_nanos())
            .unwrap_or(0);
        let root = std::env::temp_dir().join(format!(
            "tarn-read-{}-{nanos}-{}",
            std::process::id(),
            NEXT.fetch_add(1, Ordering::Relaxed)
        ));
        std::fs::create_dir(&root).map_err(|e| io(&root, e))?;
        let copy = CopyDir(root);
        let mut stack = vec![(Store::db_path(dir), copy.0.join("db"))];
        while let Some((from, to)) = stack.pop() {
            std::fs::create_dir_all(&to).map_err(|e| io(&to, e))?;
            for entry in std::fs::read_dir(&from).map_err(|e| io(&from, e))? {
                let entry = entry.map_err(|e| io(&from, e))?;
                let (src, dst) = (entry.path(), to.join(entry.file_name()));
                let kind = entry.file_type().map_err(|e| io(&src, e))?;
                if kind.is_dir() {
                    stack.push((src, dst));
                } else if kind.is_file() {
                    std::fs::copy(&src, &dst).map_err(|e| io(&src, e))?;
                }
            }
        }
        Ok(copy)
    }

    /// Removes the copies that tarn processes which no longer run left behind (a read
    /// command killed mid-way cannot remove its own).
    fn remove_stale_copies() {
        let Ok(entries) = std::fs::read_dir(std::env::temp_dir()) else {
            return;
        };
        for entry in entries.flatten() {
            let name = entry.file_name();
            let Some(pid) = name
                .to_str()
                .and_then(|n| n.strip_prefix("tarn-read-"))
                .and_then(|rest| rest.split('-').next())
                .and_then(|p| p.parse::<i32>().ok())
            else {
                continue;
            };
            let gone = nix::sys::signal::kill(nix::unistd::Pid::from_raw(pid), None)
                == Err(nix::errno::Errno::ESRCH);
            if gone {
                let _ = std::fs::remove_dir_all(entry.path());
            }
        }
    }

    /// Reads every key and value once, so that damage sled's recovery did not notice
    /// (a record in an older part of the log) is found now rather than mid-campaign.
    fn read_every_record(db: &sled::Db, dir: &Path) -> Result<(), StoreError> {
        let path = Store::db_path(dir);
        for kv in db.iter() {
            kv.map_err(|e| StoreError::Damaged {
                path: path.display().to_string(),
                file: path.join("db").display().to_string(),
                detail: format!("a record cannot be read: {e}"),
            })?;
        }
        Ok(())
    }

    /// Refuses a database without a schema record or of another schema version.
    fn check_schema(db: &sled::Db, dir: &Path) -> Result<(), StoreError> {
        let path = dir.display().to_string();
        let schema = db
            .get(b"mschema")
            .map_err(|e| StoreError::Sled {
                path: path.clone(),
                source: e,
            })?
            .ok_or_else(|| StoreError::Corrupt {
                path: path.clone(),
                key: "schema".into(),
                detail: "missing".into(),
            })?;
        let found = <[u8; 4]>::try_from(schema.as_ref())
            .map(u32::from_be_bytes)
            .map_err(|_| StoreError::Corrupt {
                path: path.clone(),
                key: "schema".into(),
                detail: "not a version number".into(),
            })?;
        if found != SCHEMA_VERSION {
            return Err(StoreError::Schema { path, found });
        }
        Ok(())
    }

    /// The number of flushed commits recorded in [`COMMIT_FILE`], if the file exists
    /// (stores written before the file existed have none, and are not checked).
    fn recorded_commits(dir: &Path) -> Result<Option<u64>, StoreError> {
        let file = dir.join(COMMIT_FILE);
        let text = match std::fs::read_to_string(&file) {
            Ok(t) => t,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
            Err(e) => {
                return Err(StoreError::Sled {
                    path: file.display().to_string(),
                    source: sled::Error::Io(e),
                })
            }
        };
        serde_json::from_str::<serde_json::Value>(&text)
            .ok()
            .and_then(|v| v.get("commits").and_then(|c| c.as_u64()))
            .map(Some)
            .ok_or_else(|| StoreError::Damaged {
                path: Store::db_path(dir).display().to_string(),
                file: file.display().to_string(),
                detail: "it does not hold a commit count".into(),
            })
    }

    /// Refuses the store when it holds fewer commits than tarn recorded as flushed.
    fn check_commits(&self) -> Result<(), StoreError> {
        let Some(recorded) = Store::recorded_commits(&self.dir)? else {
            return Ok(());
        };
        let found = self.commits.load(Ordering::SeqCst);
        if found < recorded {
            let path = Store::db_path(&self.dir);
            return Err(StoreError::Damaged {
                path: path.display().to_string(),
                file: path.join("db").display().to_string(),
                detail: format!(
                    "it holds {found} committed batches, but {} records {recorded}: sled's recovery stopped at damaged data and would drop the rest",
                    self.dir.join(COMMIT_FILE).display()
                ),
            });
        }
        Ok(())
    }

    /// Refuses a commit that the file system has no room for, before sled sees it:
    /// sled 0.34 meeting a full disk in the middle of a write can leave its I/O threads
    /// waiting forever (seen here on a full tmpfs), so that tarn would hang instead of
    /// stopping. A commit needs twice its size (sled may rewrite it into a new segment)
    /// plus [`SPACE_MARGIN`]. Space taken by another process between this check and the
    /// write can still reach sled; the check makes the common case (the disk filled by
    /// the campaign's own outputs, or by something before the commit) a clean refusal.
    fn check_space(&self, bytes: u64) -> Result<(), StoreError> {
        let Ok(fs) = nix::sys::statvfs::statvfs(&Store::db_path(&self.dir)) else {
            return Ok(());
        };
        let free = fs.blocks_available().saturating_mul(fs.fragment_size());
        let need = bytes.saturating_mul(2).saturating_add(SPACE_MARGIN);
        if free < need {
            return Err(StoreError::NoSpace {
                path: self.dir.display().to_string(),
                bytes,
                need,
                free,
            });
        }
        Ok(())
    }

    /// Records the flushed commit count beside the database (temporary file, then a
    /// rename). A failure (the disk is full) only weakens the next damage check — the
    /// batch itself is committed — so it is logged, not returned.
    fn record_commits(&self, commits: u64) {
        let file = self.dir.join(COMMIT_FILE);
        let tmp = self.dir.join(format!("{COMMIT_FILE}.tmp"));
        let text = serde_json::json!({"v": SCHEMA_VERSION, "commits": commits}).to_string();
        let written = std::fs::write(&tmp, text).and_then(|_| std::fs::rename(&tmp, &file));
        if let Err(e) = written {
            let _ = std::fs::remove_file(&tmp);
            tracing::warn!("cannot record the commit count in {}: {e}", file.display());
        }
    }

    fn wrap(db: sled::Db, dir: &Path, copy: Option<CopyDir>) -> Result<Store, StoreError> {
        let sled_err = |e| StoreError::Sled {
            path: dir.display().to_string(),
            source: e,
        };
        let last = db
            .scan_prefix(b"e")
            .keys()
            .next_back()
            .transpose()
            .map_err(sled_err)?;
        let next = last
            .and_then(|k| <[u8; 8]>::try_from(&k[1..]).ok())
            .map(|b| u64::from_be_bytes(b) + 1)
            .unwrap_or(0);
        let commits = db
            .get(COMMITS_KEY)
            .map_err(sled_err)?
            .and_then(|v| <[u8; 8]>::try_from(v.as_ref()).ok())
            .map(u64::from_be_bytes)
            .unwrap_or(0);
        Ok(Store {
            db,
            dir: dir.to_path_buf(),
            next_seq: AtomicU64::new(next),
            host: host_name(),
            commits: AtomicU64::new(commits),
            commit: Mutex::new(()),
            _copy: copy,
        })
    }

    /// Whether this store is a read-only copy.
    pub fn is_read_only(&self) -> bool {
        self._copy.is_some()
    }

    /// The campaign directory.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    fn sled_err(&self, e: sled::Error) -> StoreError {
        StoreError::Sled {
            path: self.dir.display().to_string(),
            source: e,
        }
    }

    /// Applies a batch atomically and flushes it to disk.
    pub fn apply(&self, mut batch: Batch) -> Result<(), StoreError> {
        for (kind, message) in std::mem::take(&mut batch.events) {
            let seq = self.next_seq.fetch_add(1, Ordering::SeqCst);
            let ev = EventRecord {
                v: SCHEMA_VERSION,
                seq,
                unix: now_unix(),
                kind,
                message,
                pid: std::process::id(),
                host: self.host.clone(),
            };
            batch.put(keys::event(seq), &ev);
        }
        if self.is_read_only() {
            return Err(StoreError::ReadOnly {
                path: Store::db_path(&self.dir).display().to_string(),
            });
        }
        // One commit at a time, so that the counter rises in the order of the batches.
        let _turn = self.commit.lock().unwrap_or_else(|p| p.into_inner());
        self.check_space(batch.bytes)?;
        let commits = self.commits.load(Ordering::SeqCst) + 1;
        batch
            .inner
            .insert(COMMITS_KEY.to_vec(), commits.to_be_bytes().to_vec());
        self.db
            .apply_batch(batch.inner)
            .map_err(|e| self.sled_err(e))?;
        self.db.flush().map_err(|e| self.sled_err(e))?;
        self.commits.store(commits, Ordering::SeqCst);
        self.record_commits(commits);
        Ok(())
    }

    /// Appends one event on its own.
    pub fn log_event(&self, kind: &str, message: impl Into<String>) -> Result<(), StoreError> {
        let mut b = Batch::default();
        b.event(kind, message);
        self.apply(b)
    }

    fn decode<T: DeserializeOwned>(&self, key: &[u8], bytes: &[u8]) -> Result<T, StoreError> {
        let corrupt = |detail: String| StoreError::Corrupt {
            path: self.dir.display().to_string(),
            key: printable_key(key),
            detail,
        };
        let value: serde_json::Value =
            serde_json::from_slice(bytes).map_err(|e| corrupt(e.to_string()))?;
        let v = value.get("v").and_then(|v| v.as_u64());
        if v != Some(u64::from(SCHEMA_VERSION)) {
            return Err(corrupt(format!(
                "record version {v:?}, expected {SCHEMA_VERSION}"
            )));
        }
        serde_json::from_value(value).map_err(|e| corrupt(e.to_string()))
    }

    /// Reads one record.
    pub fn get<T: DeserializeOwned>(&self, key: &[u8]) -> Result<Option<T>, StoreError> {
        match self.db.get(key).map_err(|e| self.sled_err(e))? {
            Some(bytes) => self.decode(key, &bytes).map(Some),
            None => Ok(None),
        }
    }

    /// Reads every record under a key prefix, in key order.
    pub fn scan<T: DeserializeOwned>(&self, prefix: &[u8]) -> Result<Vec<T>, StoreError> {
        let mut out = Vec::new();
        for kv in self.db.scan_prefix(prefix) {
            let (k, v) = kv.map_err(|e| self.sled_err(e))?;
            out.push(self.decode(&k, &v)?);
        }
        Ok(out)
    }

    /// Reads a blob (chunked bytes) stored under a task.
    pub fn blob(&self, task: &[u8; 10], name: &str) -> Result<Option<Vec<u8>>, StoreError> {
        let prefix = keys::array_prefix(task, name);
        let mut out = Vec::new();
        let mut any = false;
        for kv in self.db.scan_prefix(&prefix) {
            let (k, v) = kv.map_err(|e| self.sled_err(e))?;
            if v.first() != Some(&(SCHEMA_VERSION as u8)) {
                return Err(StoreError::Corrupt {
                    path: self.dir.display().to_string(),
                    key: printable_key(&k),
                    detail: "blob chunk of unknown version".into(),
                });
            }
            out.extend_from_slice(&v[1..]);
            any = true;
        }
        Ok(any.then_some(out))
    }

    /// Reads an array stored under a task.
    pub fn array(&self, task: &[u8; 10], name: &str) -> Result<Option<Array>, StoreError> {
        match self.blob(task, name)? {
            Some(bytes) => npy::decode(&bytes)
                .map(Some)
                .map_err(|e| StoreError::Corrupt {
                    path: self.dir.display().to_string(),
                    key: format!("array {name}"),
                    detail: e.to_string(),
                }),
            None => Ok(None),
        }
    }

    /// The store's creation facts.
    pub fn meta(&self) -> Result<Meta, StoreError> {
        self.get(b"mmeta")?.ok_or_else(|| StoreError::Corrupt {
            path: self.dir.display().to_string(),
            key: "meta".into(),
            detail: "missing".into(),
        })
    }

    /// Every accepted version of the campaign file, oldest first.
    pub fn campaign_versions(&self) -> Result<Vec<CampaignVersion>, StoreError> {
        self.scan(b"c")
    }

    /// The campaign file text the campaign now runs with.
    pub fn current_campaign(&self) -> Result<CampaignVersion, StoreError> {
        self.campaign_versions()?
            .pop()
            .ok_or_else(|| StoreError::Corrupt {
                path: self.dir.display().to_string(),
                key: "campaign".into(),
                detail: "no campaign file stored".into(),
            })
    }

    pub fn task(&self, r: u32, stage: u16, walker: u32) -> Result<Option<TaskRecord>, StoreError> {
        self.get(&keys::task(r, stage, walker))
    }

    pub fn round_tasks(&self, r: u32) -> Result<Vec<TaskRecord>, StoreError> {
        self.scan(&keys::round_tasks(r))
    }

    pub fn all_tasks(&self) -> Result<Vec<TaskRecord>, StoreError> {
        self.scan(b"t")
    }

    pub fn round(&self, r: u32) -> Result<Option<RoundRecord>, StoreError> {
        self.get(&keys::round(r))
    }

    pub fn rounds(&self) -> Result<Vec<RoundRecord>, StoreError> {
        self.scan(b"r")
    }

    /// The last completed round, if any.
    pub fn last_round(&self) -> Result<Option<RoundRecord>, StoreError> {
        match self.db.scan_prefix(b"r").next_back() {
            Some(kv) => {
                let (k, v) = kv.map_err(|e| self.sled_err(e))?;
                self.decode(&k, &v).map(Some)
            }
            None => Ok(None),
        }
    }

    pub fn states(&self) -> Result<Vec<StateRecord>, StoreError> {
        self.scan(b"s")
    }

    pub fn models(&self) -> Result<Vec<ModelRecord>, StoreError> {
        self.scan(b"n")
    }

    pub fn events(&self) -> Result<Vec<EventRecord>, StoreError> {
        self.scan(b"e")
    }

    /// The reason the campaign finished, if it has.
    pub fn finished(&self) -> Result<Option<StopDecision>, StoreError> {
        match self.db.get(b"mfinished").map_err(|e| self.sled_err(e))? {
            Some(bytes) => {
                let v: serde_json::Value =
                    serde_json::from_slice(&bytes).map_err(|e| StoreError::Corrupt {
                        path: self.dir.display().to_string(),
                        key: "finished".into(),
                        detail: e.to_string(),
                    })?;
                Ok(v.get("stop")
                    .cloned()
                    .and_then(|s| serde_json::from_value(s).ok()))
            }
            None => Ok(None),
        }
    }

    /// Marks (or, with `None`, unmarks) the campaign as finished.
    pub fn put_finished(b: &mut Batch, stop: Option<&StopDecision>) {
        match stop {
            Some(s) => b.put(
                b"mfinished".to_vec(),
                &serde_json::json!({"v": SCHEMA_VERSION, "stop": s}),
            ),
            None => b.inner.remove(b"mfinished".to_vec()),
        }
    }

    /// Size of the database on disk, in bytes.
    pub fn size_on_disk(&self) -> u64 {
        self.db.size_on_disk().unwrap_or(0)
    }

    /// A hash over all scientific content: campaign texts, committed task outputs and
    /// metrics, the catalogue, round metrics and models — and nothing about time,
    /// hosts, process ids, durations or attempts. Tasks are visited in key order, so
    /// the order in which parallel tasks finished cannot change it.
    pub fn digest(&self) -> Result<String, StoreError> {
        let mut h = Sha256::new();
        let mut feed = |label: &str, bytes: &[u8]| {
            h.update(label.as_bytes());
            h.update((bytes.len() as u64).to_be_bytes());
            h.update(bytes);
        };
        for c in self.campaign_versions()? {
            // Without [executor] and the stages' slurm tables: where tasks ran is not
            // science (see `spec::science_hash`).
            let hash = crate::spec::science_hash(&c.text).unwrap_or(c.hash);
            feed("campaign", hash.as_bytes());
        }
        for t in self.all_tasks()? {
            if t.status != TaskStatus::Done {
                continue;
            }
            let science = serde_json::json!({
                "id": t.id, "round": t.round, "stage": t.stage, "role": t.role, "kind": t.kind,
                "walker": t.walker, "seed": t.seed, "metrics": t.metrics,
                "energy_evals": t.energy_evals, "arrays": t.arrays, "model": t.model_sha256,
            });
            feed("task", science.to_string().as_bytes());
            let key = keys::task_suffix(t.round, t.stage_index, t.walker);
            for name in t.arrays.keys() {
                if let Some(bytes) = self.blob(&key, name)? {
                    feed(name, &bytes);
                }
            }
        }
        for s in self.states()? {
            let science = serde_json::json!({
                "id": s.id, "energy": s.energy.to_bits(),
                "representative": s.representative.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
                "found": s.found, "sightings": s.sightings,
                "estimates": s.estimates.iter().map(|e| (e.round, e.free_energy.to_bits(), e.free_energy_err.map(f64::to_bits))).collect::<Vec<_>>(),
            });
            feed("state", science.to_string().as_bytes());
        }
        for r in self.rounds()? {
            let stages: Vec<_> = r
                .stages
                .iter()
                .map(|s| serde_json::json!({"name": s.name, "tasks": s.tasks, "samples": s.samples, "energy_evals": s.energy_evals, "metrics": s.metrics}))
                .collect();
            let science = serde_json::json!({
                "round": r.round, "stages": stages, "new_states": r.new_states,
                "states_total": r.states_total, "energy_evals": r.energy_evals,
                "stop": r.stop.as_ref().filter(|s| s.rule != "max_wall_seconds").map(|s| &s.rule),
            });
            feed("round", science.to_string().as_bytes());
        }
        for m in self.models()? {
            feed(
                "model",
                format!("{}:{}:{}", m.round, m.task, m.sha256).as_bytes(),
            );
        }
        Ok(hex::encode(h.finalize()))
    }
}

/// A key made readable for messages.
fn printable_key(key: &[u8]) -> String {
    let (p, rest) = key
        .split_first()
        .map(|(p, r)| (*p as char, r))
        .unwrap_or(('?', &[]));
    format!("{p}:{}", hex::encode(rest))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn meta() -> Meta {
        Meta {
            v: SCHEMA_VERSION,
            campaign: "t".into(),
            created_unix: 0.0,
            tarn_version: "test".into(),
            base_dir: ".".into(),
        }
    }

    fn version() -> CampaignVersion {
        CampaignVersion {
            v: SCHEMA_VERSION,
            index: 0,
            hash: "0123456789abcdef".into(),
            text: "name = \"t\"".into(),
            path: "t.toml".into(),
            accepted_unix: 0.0,
        }
    }

    #[test]
    fn a_store_of_another_schema_version_is_refused_and_left_unchanged() {
        let dir = tempfile::tempdir().unwrap();
        {
            let s = Store::create(dir.path(), &meta(), &version()).unwrap();
            s.db.insert(b"mschema", 99u32.to_be_bytes().to_vec())
                .unwrap();
            s.db.flush().unwrap();
        }
        let err = Store::open(dir.path()).err().expect("refused");
        assert!(
            err.to_string()
                .contains("has schema version 99, but this tarn reads version 1"),
            "{err}"
        );
        // Refusing did not rewrite it.
        let again = Store::open(dir.path()).err().expect("still refused");
        assert!(matches!(again, StoreError::Schema { found: 99, .. }));
    }

    #[test]
    fn a_damaged_record_is_reported_by_key_not_rewritten() {
        let dir = tempfile::tempdir().unwrap();
        let s = Store::create(dir.path(), &meta(), &version()).unwrap();
        s.db.insert(keys::round(1), b"{not json".to_vec()).unwrap();
        let err = s.rounds().expect_err("damaged");
        assert!(
            err.to_string().contains("record r:00000001 is unreadable"),
            "{err}"
        );
        assert_eq!(
            s.db.get(keys::round(1)).unwrap().unwrap().as_ref(),
            b"{not json"
        );
    }

    #[test]
    fn a_record_of_an_unknown_version_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let s = Store::create(dir.path(), &meta(), &version()).unwrap();
        let mut v = serde_json::to_value(meta()).unwrap();
        v["v"] = 7.into();
        s.db.insert(b"mmeta", serde_json::to_vec(&v).unwrap())
            .unwrap();
        let err = s.meta().expect_err("refused");
        assert!(
            err.to_string()
                .contains("record version Some(7), expected 1"),
            "{err}"
        );
    }

    #[test]
    fn arrays_round_trip_through_chunks() {
        let dir = tempfile::tempdir().unwrap();
        let s = Store::create(dir.path(), &meta(), &version()).unwrap();
        let n = CHUNK / 8 + 10; // more than one chunk
        let a = Array::vector((0..n).map(|i| i as f64 * 0.5).collect());
        let key = keys::task_suffix(1, 0, 2);
        let mut b = Batch::default();
        b.put_array(&key, "samples", &a);
        s.apply(b).unwrap();
        assert_eq!(s.array(&key, "samples").unwrap().unwrap(), a);
        assert_eq!(s.array(&key, "energies").unwrap(), None);
    }

    #[test]
    fn a_store_holding_fewer_commits_than_recorded_is_refused_untouched() {
        let dir = tempfile::tempdir().unwrap();
        {
            let s = Store::create(dir.path(), &meta(), &version()).unwrap();
            s.log_event("a", "one").unwrap();
        }
        let recorded = std::fs::read_to_string(dir.path().join(COMMIT_FILE)).unwrap();
        assert!(recorded.contains("\"commits\":2"), "{recorded}");
        // What a store cut back by sled's recovery looks like: the file beside it
        // records more flushed commits than the database holds.
        std::fs::write(dir.path().join(COMMIT_FILE), r#"{"v":1,"commits":5}"#).unwrap();
        let db_file = dir.path().join("db/db");
        let before = std::fs::read(&db_file).unwrap();
        for open in [Store::open, Store::open_read_only] {
            let err = open(dir.path()).err().expect("refused");
            let shown = err.to_string();
            assert!(matches!(err, StoreError::Damaged { .. }), "{shown}");
            assert!(
                shown.contains(&format!("{} is damaged", db_file.display()))
                    && shown.contains("holds 2 committed batches")
                    && shown.contains("records 5"),
                "{shown}"
            );
            assert_eq!(std::fs::read(&db_file).unwrap(), before);
        }
    }

    #[test]
    fn a_read_only_store_reads_a_copy_and_refuses_writes() {
        let dir = tempfile::tempdir().unwrap();
        drop(Store::create(dir.path(), &meta(), &version()).unwrap());
        let s = Store::open_read_only(dir.path()).unwrap();
        assert!(s.is_read_only());
        assert_eq!(s.meta().unwrap(), meta());
        let err = s.log_event("a", "one").expect_err("read-only");
        assert!(matches!(err, StoreError::ReadOnly { .. }), "{err}");
        // The copy holds no lock on the original, so the engine can open it meanwhile.
        let w = Store::open(dir.path()).unwrap();
        w.log_event("b", "two").unwrap();
        assert_eq!(w.events().unwrap().len(), 2);
        assert_eq!(s.events().unwrap().len(), 1);
        // The original is locked by the writer: a read-only open is refused as locked.
        let locked = Store::open_read_only(dir.path()).err().expect("locked");
        assert!(matches!(locked, StoreError::Locked { .. }), "{locked}");
    }

    #[test]
    fn a_store_without_a_commit_file_is_accepted() {
        let dir = tempfile::tempdir().unwrap();
        drop(Store::create(dir.path(), &meta(), &version()).unwrap());
        std::fs::remove_file(dir.path().join(COMMIT_FILE)).unwrap();
        let s = Store::open(dir.path()).unwrap();
        assert_eq!(s.events().unwrap().len(), 1);
    }

    #[test]
    fn events_are_numbered_in_order_across_reopens() {
        let dir = tempfile::tempdir().unwrap();
        {
            let s = Store::create(dir.path(), &meta(), &version()).unwrap();
            s.log_event("a", "one").unwrap();
        }
        let s = Store::open(dir.path()).unwrap();
        s.log_event("b", "two").unwrap();
        let seqs: Vec<u64> = s.events().unwrap().iter().map(|e| e.seq).collect();
        assert_eq!(seqs, vec![0, 1, 2]);
    }
}
