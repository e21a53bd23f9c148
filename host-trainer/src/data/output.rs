//! Nothing half-written is left behind: every output goes to a temporary file in the target
//! folder and is renamed into place only when it is complete.

use std::io::Write;
use std::path::Path;

use anyhow::{Context, Result};

/// Write `path` atomically: `fill` writes into a temporary file beside it, which is flushed,
/// synced and renamed over `path` only if `fill` succeeds. On error the temporary file is removed.
pub fn write_atomic<F>(path: &Path, fill: F) -> Result<()>
where
    F: FnOnce(&mut dyn Write) -> Result<()>,
{
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    let mut tmp = tempfile::Builder::new()
        .prefix(".ellipsoid-")
        .suffix(".tmp")
        .tempfile_in(dir)
        .with_context(|| format!("cannot create a temporary file in {}", dir.display()))?;
    {
        let mut w = std::io::BufWriter::new(tmp.as_file_mut());
        fill(&mut w).with_context(|| format!("while writing {}", path.display()))?;
        w.flush()
            .with_context(|| format!("while writing {}", path.display()))?;
    }
    tmp.as_file()
        .sync_all()
        .with_context(|| format!("while writing {}", path.display()))?;
    // A temporary file is private (0600); the finished file gets the usual 0644.
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(tmp.path(), std::fs::Permissions::from_mode(0o644))
            .with_context(|| format!("while writing {}", path.display()))?;
    }
    tmp.persist(path)
        .with_context(|| format!("cannot move the finished file to {}", path.display()))?;
    Ok(())
}

/// [`write_atomic`] for a whole byte buffer.
pub fn write_bytes(path: &Path, bytes: &[u8]) -> Result<()> {
    write_atomic(path, |w| Ok(w.write_all(bytes)?))
}

#[cfg(test)]
mod tests {
    use super::*;

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
}
