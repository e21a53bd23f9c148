//! Nothing half-written is left behind, and a command writes all its outputs or none.
//!
//! # The design
//!
//! An [`Outputs`] stages every file of one command (for `fit`: blob, card, report) in a temporary
//! file beside its target (`.ellipsoid-XXXXXX.tmp`, same folder, so a rename is atomic), writes
//! and `fsync`s it. While a temporary file exists its writer holds an exclusive `flock` on it.
//! A failure while staging (a full disk, `--report /proc/r.html`) removes the staged files and
//! replaces nothing. Then [`Outputs::commit`]:
//!
//! 1. locks the target folders (an exclusive `flock` on each folder, in a fixed order), so two
//!    commits to the same folder run one after the other, and readers ([`settle`]) wait for them;
//! 2. finishes any commit a killed process left half-done there (below), and removes temporary
//!    files nobody holds a lock on that are older than this process (those of a killed run);
//! 3. for more than one file, writes a journal `.ellipsoid-XXXXXX.journal` in the first target's
//!    folder (itself staged, synced and renamed into place) that lists every `temporary → target`;
//! 4. renames each staged file onto its target and syncs the folders;
//! 5. removes the journal.
//!
//! A kill before the journal is in place leaves the old files untouched (the orphaned temporary
//! files are removed by the next commit in that folder). A kill after it leaves a journal whose
//! temporary files are all complete and synced: the next commit to that folder, and every reader
//! of a model there ([`settle`]), rolls it forward first. So blob, card and report are replaced
//! together or not at all, even against a kill, and two concurrent fits to one `--out` end with
//! the blob and card of the same fit. One corner: a report in another folder than the blob whose
//! orphaned temporary file was cleaned there before the roll-forward is simply not replaced.

use std::fs::File;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;
use std::time::SystemTime;

use anyhow::{Context, Result};
use serde::{Deserialize, Serialize};

use crate::data::ingest::IngestError;

const PREFIX: &str = ".ellipsoid-";
const TMP: &str = ".tmp";
const JOURNAL: &str = ".journal";

static START: OnceLock<SystemTime> = OnceLock::new();

/// Note when this process started (called first thing by the command line); temporary files
/// older than this that nobody holds a lock on are left over from a killed run.
pub fn mark_start() {
    START.get_or_init(SystemTime::now);
}

fn started() -> SystemTime {
    *START.get_or_init(SystemTime::now)
}

fn folder_of(path: &Path) -> PathBuf {
    match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// One staged file: its temporary file (open and locked) and where it goes.
struct Staged {
    tmp: tempfile::NamedTempFile,
    target: PathBuf,
}

/// The files one command writes, staged until [`Outputs::commit`] puts them all in place.
#[derive(Default)]
pub struct Outputs {
    staged: Vec<Staged>,
}

/// What a journal lists: each temporary file and its target.
#[derive(Serialize, Deserialize)]
struct Journal {
    moves: Vec<(PathBuf, PathBuf)>,
}

impl Outputs {
    /// Nothing staged yet.
    pub fn new() -> Self {
        Self::default()
    }

    /// Write `path`'s new content through `fill` into a temporary file beside it, synced.
    /// An error from reading an input ([`IngestError`]) is passed on as it is, so that it names
    /// the input's file, line and column first; other errors say which output was being written.
    pub fn stage<F>(&mut self, path: &Path, fill: F) -> Result<()>
    where
        F: FnOnce(&mut dyn Write) -> Result<()>,
    {
        started();
        let dir = folder_of(path);
        let mut tmp = tempfile::Builder::new()
            .prefix(PREFIX)
            .suffix(TMP)
            .tempfile_in(&dir)
            .with_context(|| {
                if dir.is_dir() {
                    format!("cannot create a temporary file in {}", dir.display())
                } else {
                    format!(
                        "cannot write {}: the folder {} does not exist",
                        path.display(),
                        dir.display()
                    )
                }
            })?;
        // Held while the file exists: a cleaner that can take this lock knows its writer is gone.
        tmp.as_file()
            .lock()
            .with_context(|| format!("cannot lock a temporary file in {}", dir.display()))?;
        let writing = || format!("while writing {}", path.display());
        {
            let mut w = std::io::BufWriter::new(tmp.as_file_mut());
            if let Err(e) = fill(&mut w) {
                return Err(if e.downcast_ref::<IngestError>().is_some() {
                    e
                } else {
                    e.context(writing())
                });
            }
            w.flush().with_context(writing)?;
        }
        tmp.as_file().sync_all().with_context(writing)?;
        // A temporary file is private (0600); the finished file gets the usual 0644.
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            std::fs::set_permissions(tmp.path(), std::fs::Permissions::from_mode(0o644))
                .with_context(writing)?;
        }
        self.staged.push(Staged {
            tmp,
            target: path.to_path_buf(),
        });
        Ok(())
    }

    /// [`Outputs::stage`] for a whole byte buffer.
    pub fn stage_bytes(&mut self, path: &Path, bytes: &[u8]) -> Result<()> {
        self.stage(path, |w| Ok(w.write_all(bytes)?))
    }

    /// Put every staged file in place, all or none (see the module documentation).
    pub fn commit(self) -> Result<()> {
        self.commit_until(usize::MAX, started())
    }

    /// [`Outputs::commit`], stopping as a kill would after `renames` renames (for tests), and
    /// taking unlocked temporary files from before `stale_before` as left by killed runs.
    fn commit_until(self, renames: usize, stale_before: SystemTime) -> Result<()> {
        let Some(first) = self.staged.first() else {
            return Ok(());
        };
        let home = folder_of(&first.target);
        let mut dirs: Vec<PathBuf> = self.staged.iter().map(|s| folder_of(&s.target)).collect();
        dirs.sort();
        dirs.dedup();
        let _locks = dirs
            .iter()
            .map(|d| lock_folder(d))
            .collect::<Result<Vec<_>>>()?;
        let mine: Vec<PathBuf> = self
            .staged
            .iter()
            .map(|s| s.tmp.path().to_path_buf())
            .collect();
        for d in &dirs {
            recover(d)?;
            clean_stale(d, &mine, stale_before);
        }
        let journal = if self.staged.len() > 1 {
            let j = Journal {
                moves: self
                    .staged
                    .iter()
                    .map(|s| Ok((absolute(s.tmp.path())?, absolute(&s.target)?)))
                    .collect::<Result<_>>()?,
            };
            Some(write_journal(&home, &j)?)
        } else {
            None
        };
        for (k, s) in self.staged.into_iter().enumerate() {
            if k >= renames {
                // As a kill would: the temporary file stays, unlocked, and so does the journal.
                let _ = s.tmp.into_temp_path().keep();
                continue;
            }
            let target = s.target;
            s.tmp.persist(&target).with_context(|| {
                format!("cannot move the finished file to {}", target.display())
            })?;
        }
        if renames < usize::MAX {
            return Ok(());
        }
        for d in &dirs {
            sync_folder(d)?;
        }
        if let Some(j) = journal {
            std::fs::remove_file(&j)
                .with_context(|| format!("cannot remove the journal {}", j.display()))?;
            sync_folder(&home)?;
        }
        Ok(())
    }
}

/// Write `path` atomically: `fill` writes into a temporary file beside it, which is synced and
/// renamed over `path` only if `fill` succeeds. On error nothing is replaced.
pub fn write_atomic<F>(path: &Path, fill: F) -> Result<()>
where
    F: FnOnce(&mut dyn Write) -> Result<()>,
{
    let mut o = Outputs::new();
    o.stage(path, fill)?;
    o.commit()
}

/// [`write_atomic`] for a whole byte buffer.
pub fn write_bytes(path: &Path, bytes: &[u8]) -> Result<()> {
    write_atomic(path, |w| Ok(w.write_all(bytes)?))
}

/// Before reading files that a commit writes together (a blob and its card): wait for a commit
/// in progress in `path`'s folder, and finish one a killed process left there. The folder stays
/// locked, so no commit starts, until the guard is dropped. A folder that cannot be opened is
/// left to the reader's own error.
pub fn settle(path: &Path) -> Result<Option<File>> {
    let dir = folder_of(path);
    let Ok(lock) = lock_folder(&dir) else {
        return Ok(None);
    };
    recover(&dir)?;
    Ok(Some(lock))
}

fn lock_folder(dir: &Path) -> Result<File> {
    let f = File::open(dir).with_context(|| format!("cannot open the folder {}", dir.display()))?;
    f.lock()
        .with_context(|| format!("cannot lock the folder {}", dir.display()))?;
    Ok(f)
}

fn sync_folder(dir: &Path) -> Result<()> {
    File::open(dir)
        .and_then(|f| f.sync_all())
        .with_context(|| format!("cannot sync the folder {}", dir.display()))
}

fn absolute(p: &Path) -> Result<PathBuf> {
    std::path::absolute(p).with_context(|| format!("cannot resolve {}", p.display()))
}

fn write_journal(home: &Path, j: &Journal) -> Result<PathBuf> {
    let mut tmp = tempfile::Builder::new()
        .prefix(PREFIX)
        .suffix(".journal-tmp")
        .tempfile_in(home)
        .with_context(|| format!("cannot create a journal in {}", home.display()))?;
    serde_json::to_writer(tmp.as_file_mut(), j)?;
    tmp.as_file().sync_all()?;
    let (_, path) = tempfile::Builder::new()
        .prefix(PREFIX)
        .suffix(JOURNAL)
        .tempfile_in(home)?
        .keep()?;
    tmp.persist(&path)
        .with_context(|| format!("cannot write the journal {}", path.display()))?;
    sync_folder(home)?;
    Ok(path)
}

fn ours(name: &str, suffix: &str) -> bool {
    name.starts_with(PREFIX) && name.ends_with(suffix)
}

/// Finish every commit that a killed process left in `dir` (the caller holds `dir`'s lock).
fn recover(dir: &Path) -> Result<()> {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return Ok(());
    };
    for e in entries.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        if !ours(&name, JOURNAL) {
            continue;
        }
        let path = e.path();
        let text = std::fs::read(&path)
            .with_context(|| format!("cannot read the journal {}", path.display()))?;
        // An empty journal is one whose content never arrived (the kill came first): nothing to do.
        if let Ok(j) = serde_json::from_slice::<Journal>(&text) {
            for (tmp, target) in &j.moves {
                if tmp.exists() {
                    std::fs::rename(tmp, target).with_context(|| {
                        format!(
                            "cannot finish an interrupted write of {} (from {})",
                            target.display(),
                            tmp.display()
                        )
                    })?;
                }
            }
            for d in j.moves.iter().map(|(_, t)| folder_of(t)) {
                sync_folder(&d)?;
            }
        }
        std::fs::remove_file(&path)
            .with_context(|| format!("cannot remove the journal {}", path.display()))?;
        sync_folder(dir)?;
    }
    Ok(())
}

/// Remove temporary files in `dir` left by killed runs: not in `mine`, older than this process,
/// and not locked by a live writer. Best effort: a file that cannot be removed stays.
fn clean_stale(dir: &Path, mine: &[PathBuf], stale_before: SystemTime) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for e in entries.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        if !(ours(&name, TMP) || ours(&name, ".journal-tmp")) {
            continue;
        }
        let path = e.path();
        if mine.iter().any(|m| m.file_name() == path.file_name()) {
            continue;
        }
        let old = e
            .metadata()
            .and_then(|m| m.modified())
            .is_ok_and(|t| t < stale_before);
        if !old {
            continue;
        }
        let Ok(f) = File::open(&path) else { continue };
        if f.try_lock().is_ok() {
            let _ = std::fs::remove_file(&path);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn names(dir: &Path) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }

    #[test]
    fn failed_write_leaves_nothing_behind() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("out.bin");
        let r = write_atomic(&target, |w| {
            w.write_all(b"half")?;
            anyhow::bail!("disk on fire")
        });
        assert!(r.is_err());
        assert!(!target.exists());
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
    }

    #[test]
    fn successful_write_replaces_the_file() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("out.bin");
        std::fs::write(&target, b"old").unwrap();
        write_bytes(&target, b"new").unwrap();
        assert_eq!(std::fs::read(&target).unwrap(), b"new");
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    /// Three old files, three new ones staged.
    fn three(dir: &Path) -> (Vec<PathBuf>, Outputs) {
        let targets: Vec<PathBuf> = ["a.blob", "a.json", "r.html"]
            .iter()
            .map(|n| dir.join(n))
            .collect();
        let mut o = Outputs::new();
        for t in &targets {
            std::fs::write(t, b"old").unwrap();
            o.stage_bytes(t, b"new").unwrap();
        }
        (targets, o)
    }

    fn contents(targets: &[PathBuf]) -> Vec<String> {
        targets
            .iter()
            .map(|t| std::fs::read_to_string(t).unwrap())
            .collect()
    }

    #[test]
    fn a_kill_between_renames_is_rolled_forward_by_the_next_reader() {
        for k in 1..3 {
            let dir = tempfile::tempdir().unwrap();
            let (targets, o) = three(dir.path());
            o.commit_until(k, started()).unwrap();
            // As the kill left it: some new, some old, and a journal.
            let c = contents(&targets);
            assert_eq!(c.iter().filter(|s| *s == "new").count(), k, "{c:?}");
            assert!(names(dir.path()).iter().any(|n| n.ends_with(JOURNAL)));
            drop(settle(&targets[0]).unwrap());
            assert_eq!(contents(&targets), ["new", "new", "new"], "k = {k}");
            assert_eq!(names(dir.path()), ["a.blob", "a.json", "r.html"]);
        }
    }

    #[test]
    fn a_kill_before_the_journal_leaves_the_old_files_and_no_litter() {
        let dir = tempfile::tempdir().unwrap();
        let (targets, o) = three(dir.path());
        // The kill came while staging: the temporary files stay, unlocked, with no journal.
        for s in o.staged {
            let _ = s.tmp.into_temp_path().keep();
        }
        assert_eq!(names(dir.path()).len(), 6);
        drop(settle(&targets[0]).unwrap());
        assert_eq!(contents(&targets), ["old", "old", "old"]);
        // The next run's commit in the folder (which started after those files were made)
        // removes them.
        let next_run_started = SystemTime::now() + std::time::Duration::from_secs(1);
        let mut o = Outputs::new();
        o.stage_bytes(&dir.path().join("z.txt"), b"z").unwrap();
        o.commit_until(usize::MAX, next_run_started).unwrap();
        assert_eq!(names(dir.path()), ["a.blob", "a.json", "r.html", "z.txt"]);
    }

    #[test]
    fn a_live_writers_temporary_file_is_not_removed() {
        let dir = tempfile::tempdir().unwrap();
        let mut live = Outputs::new();
        live.stage_bytes(&dir.path().join("slow.csv"), b"x")
            .unwrap();
        // Old enough to be removed, but its writer holds its lock.
        let mut o = Outputs::new();
        o.stage_bytes(&dir.path().join("fast.csv"), b"y").unwrap();
        let later = SystemTime::now() + std::time::Duration::from_secs(1);
        o.commit_until(usize::MAX, later).unwrap();
        assert_eq!(names(dir.path()).len(), 2, "{:?}", names(dir.path()));
        live.commit().unwrap();
        assert_eq!(names(dir.path()), ["fast.csv", "slow.csv"]);
    }
}
