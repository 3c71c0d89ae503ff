//! All-or-nothing outputs: files are written into a staging directory
//! inside the output directory and moved into place only when the whole run
//! succeeded.
//!
//! [`OutputDir::create`] makes `<out>/.tagwright-staging-<pid>-<n>/`;
//! [`OutputDir::path`] names a file in it; [`OutputDir::commit`] syncs each
//! staged file and renames it into `<out>` (a rename within one file
//! system: each file is replaced whole, never seen half-written), then
//! removes the staging directory. An `OutputDir` dropped without `commit`
//! (an error, a panic) removes the staging directory and leaves the outputs
//! of an earlier run untouched. A staging directory left by a process that
//! was killed can be deleted by hand.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

use super::{IoError, Result};

/// Prefix of staging directory names.
pub const STAGING_PREFIX: &str = ".tagwright-staging-";

/// An output directory with a staging area. See the module documentation.
#[derive(Debug)]
pub struct OutputDir {
    out: PathBuf,
    staging: PathBuf,
    committed: bool,
}

fn write_error(path: &Path, e: impl Into<super::BoxError>) -> IoError {
    IoError::Write { path: path.to_path_buf(), source: e.into() }
}

impl OutputDir {
    /// Creates `out_dir` if missing, and a fresh staging directory inside it.
    pub fn create(out_dir: &Path) -> Result<OutputDir> {
        static COUNTER: AtomicU64 = AtomicU64::new(0);
        std::fs::create_dir_all(out_dir).map_err(|e| write_error(out_dir, e))?;
        loop {
            let n = COUNTER.fetch_add(1, Ordering::Relaxed);
            let staging = out_dir.join(format!("{STAGING_PREFIX}{}-{n}", std::process::id()));
            match std::fs::create_dir(&staging) {
                Ok(()) => return Ok(OutputDir { out: out_dir.to_path_buf(), staging, committed: false }),
                Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => continue,
                Err(e) => return Err(write_error(&staging, e)),
            }
        }
    }

    /// The staging path of an output named `name` (it lands at `<out>/<name>`).
    pub fn path(&self, name: &str) -> PathBuf {
        self.staging.join(name)
    }

    /// The output directory.
    pub fn out_dir(&self) -> &Path {
        &self.out
    }

    /// Moves every staged entry into the output directory, replacing older
    /// outputs of the same name, and removes the staging directory.
    pub fn commit(mut self) -> Result<()> {
        let mut names = Vec::new();
        let entries = std::fs::read_dir(&self.staging).map_err(|e| write_error(&self.staging, e))?;
        for entry in entries {
            let entry = entry.map_err(|e| write_error(&self.staging, e))?;
            names.push(entry.file_name());
        }
        names.sort();
        // Flush every file to disk before any becomes visible.
        for name in &names {
            let p = self.staging.join(name);
            if p.is_file() {
                std::fs::File::open(&p).and_then(|f| f.sync_all()).map_err(|e| write_error(&p, e))?;
            }
        }
        for name in &names {
            let from = self.staging.join(name);
            let to = self.out.join(name);
            if from.is_dir() && to.is_dir() {
                // A directory cannot replace a non-empty one by rename: move the old one aside first.
                let old = self.staging.join(format!(".replaced-{}", name.to_string_lossy()));
                std::fs::rename(&to, &old).map_err(|e| write_error(&to, e))?;
            }
            std::fs::rename(&from, &to).map_err(|e| write_error(&to, e))?;
        }
        sync_dir(&self.out);
        self.committed = true;
        std::fs::remove_dir_all(&self.staging).map_err(|e| write_error(&self.staging, e))?;
        Ok(())
    }
}

impl Drop for OutputDir {
    fn drop(&mut self) {
        if !self.committed {
            let _ = std::fs::remove_dir_all(&self.staging);
        }
    }
}

/// Syncs a directory's entries (the renames) where the platform allows it.
fn sync_dir(dir: &Path) {
    if let Ok(d) = std::fs::File::open(dir) {
        let _ = d.sync_all();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn staging_dirs(out: &Path) -> Vec<String> {
        std::fs::read_dir(out)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .filter(|n| n.starts_with(STAGING_PREFIX))
            .collect()
    }

    #[test]
    fn commit_replaces_outputs_and_removes_staging() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path().join("run/out");
        let o = OutputDir::create(&out).unwrap();
        std::fs::write(o.path("cleaned.parquet"), b"first").unwrap();
        std::fs::write(o.path("provenance.jsonl"), b"{}\n").unwrap();
        assert!(!out.join("cleaned.parquet").exists(), "nothing visible before commit");
        o.commit().unwrap();
        assert_eq!(std::fs::read(out.join("cleaned.parquet")).unwrap(), b"first");
        assert!(staging_dirs(&out).is_empty());

        let o = OutputDir::create(&out).unwrap();
        std::fs::write(o.path("cleaned.parquet"), b"second").unwrap();
        std::fs::create_dir(o.path("assets")).unwrap();
        std::fs::write(o.path("assets").join("a.txt"), b"a").unwrap();
        o.commit().unwrap();
        assert_eq!(std::fs::read(out.join("cleaned.parquet")).unwrap(), b"second");
        assert_eq!(std::fs::read(out.join("provenance.jsonl")).unwrap(), b"{}\n", "other outputs stay");

        // A directory output replaces the older directory of the same name.
        let o = OutputDir::create(&out).unwrap();
        std::fs::create_dir(o.path("assets")).unwrap();
        std::fs::write(o.path("assets").join("b.txt"), b"b").unwrap();
        o.commit().unwrap();
        assert!(out.join("assets/b.txt").exists() && !out.join("assets/a.txt").exists());
        assert!(staging_dirs(&out).is_empty());
    }

    #[test]
    fn drop_without_commit_leaves_old_outputs() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path();
        std::fs::write(out.join("cleaned.parquet"), b"old").unwrap();
        {
            let o = OutputDir::create(out).unwrap();
            std::fs::write(o.path("cleaned.parquet"), b"half").unwrap();
            assert_eq!(staging_dirs(out).len(), 1);
        }
        assert_eq!(std::fs::read(out.join("cleaned.parquet")).unwrap(), b"old");
        assert!(staging_dirs(out).is_empty());
    }

    #[test]
    fn two_staging_areas_do_not_collide() {
        let dir = tempfile::tempdir().unwrap();
        let a = OutputDir::create(dir.path()).unwrap();
        let b = OutputDir::create(dir.path()).unwrap();
        assert_ne!(a.path("x"), b.path("x"));
    }

    #[test]
    fn unwritable_location_is_an_error() {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("a_file");
        std::fs::write(&file, b"x").unwrap();
        let e = OutputDir::create(&file.join("out")).unwrap_err().to_string();
        assert!(e.contains("a_file/out: cannot write"), "{e}");
    }
}
