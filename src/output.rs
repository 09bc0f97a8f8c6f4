//! Writes a run directory all at once: every file goes into a temporary
//! directory beside the target, the manifest and signature are written last,
//! and the directory is renamed into place. A run that fails midway leaves no
//! partial output (the temporary directory is removed when dropped).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use ed25519_dalek::SigningKey;

use crate::error::{Error, Result};
use crate::sign::{self, Manifest, MANIFEST, SIGNATURE};

/// Refuses an output file that already exists.
pub fn check_file_target(target: &Path) -> Result<()> {
    if target.exists() {
        return Err(Error::Output {
            path: target.to_path_buf(),
            message: "already exists; anomark never overwrites an output: remove it or choose another name".into(),
        });
    }
    Ok(())
}

/// Refuses a run directory target that exists and is not empty.
pub fn check_target(target: &Path) -> Result<()> {
    if target.exists() {
        let empty = target.is_dir()
            && std::fs::read_dir(target)
                .map(|mut d| d.next().is_none())
                .unwrap_or(false);
        if !empty {
            return Err(Error::Output {
                path: target.to_path_buf(),
                message: "already exists; anomark never overwrites a run directory, \
                          choose a new `--out`"
                    .into(),
            });
        }
    }
    Ok(())
}

/// The files of a run, in memory until [`RunFiles::commit`].
#[derive(Debug, Default)]
pub struct RunFiles {
    files: BTreeMap<String, Vec<u8>>,
}

impl RunFiles {
    /// Adds a file (a relative name with `/` separators).
    pub fn add(&mut self, name: &str, bytes: Vec<u8>) {
        self.files.insert(name.to_string(), bytes);
    }

    /// A file's bytes, if added.
    pub fn get(&self, name: &str) -> Option<&[u8]> {
        self.files.get(name).map(Vec::as_slice)
    }

    /// The file names, sorted.
    pub fn names(&self) -> Vec<String> {
        self.files.keys().cloned().collect()
    }

    /// Writes everything to a temporary directory beside `target`, signs the
    /// manifest, and renames the directory into place.
    pub fn commit(self, target: &Path, key: &SigningKey) -> Result<PathBuf> {
        check_target(target)?;
        let parent = match target.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => PathBuf::from("."),
        };
        std::fs::create_dir_all(&parent)
            .map_err(|e| Error::io(&parent, "creating output parent", e))?;
        let tmp = tempfile::Builder::new()
            .prefix(".anomark-partial-")
            .tempdir_in(&parent)
            .map_err(|e| Error::io(&parent, "creating temporary directory in", e))?;

        for name in self.files.keys() {
            if let Some(dir) = tmp.path().join(name).parent() {
                std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, "creating", e))?;
            }
        }
        // Files are written, flushed and hashed on all cores; the manifest
        // lists them in name order whatever the order of completion.
        use rayon::prelude::*;
        let digests: BTreeMap<String, crate::audit::hash::FileDigest> = self
            .files
            .par_iter()
            .map(|(name, bytes)| {
                write_synced(&tmp.path().join(name), bytes)?;
                Ok((
                    name.clone(),
                    crate::audit::hash::FileDigest {
                        bytes: bytes.len() as u64,
                        blake3: crate::audit::hash::bytes(bytes),
                    },
                ))
            })
            .collect::<Result<_>>()?;
        let manifest = Manifest {
            format: 1,
            tool: crate::record::tool(),
            key_fingerprint: sign::fingerprint(&key.verifying_key()),
            files: digests,
        };
        let mut manifest_bytes = serde_json::to_vec_pretty(&manifest)
            .map_err(|e| Error::internal(format!("serialising the manifest: {e}")))?;
        manifest_bytes.push(b'\n');
        write_synced(&tmp.path().join(MANIFEST), &manifest_bytes)?;
        write_synced(
            &tmp.path().join(SIGNATURE),
            sign::sign(key, &manifest_bytes).as_bytes(),
        )?;

        fail_point("before-rename")?;
        if target.is_dir() {
            // An empty directory (checked above) is replaced.
            std::fs::remove_dir(target).map_err(|e| Error::io(target, "replacing", e))?;
        }
        let kept = tmp.keep();
        if let Err(e) = std::fs::rename(&kept, target) {
            let _ = std::fs::remove_dir_all(&kept);
            return Err(Error::io(
                target,
                "renaming the run directory into place",
                e,
            ));
        }
        Ok(target.to_path_buf())
    }
}

fn write_synced(path: &Path, bytes: &[u8]) -> Result<()> {
    use std::io::Write;
    let mut f = std::fs::File::create(path).map_err(|e| Error::io(path, "creating", e))?;
    f.write_all(bytes)
        .and_then(|_| f.sync_all())
        .map_err(|e| Error::io(path, "writing", e))
}

/// Test hook: `ANOMARK_FAIL_AT=<point>` makes the run fail at that point, to
/// prove that a failed run leaves nothing behind.
fn fail_point(point: &str) -> Result<()> {
    if std::env::var("ANOMARK_FAIL_AT").ok().as_deref() == Some(point) {
        return Err(Error::internal(format!("injected failure at `{point}`")));
    }
    Ok(())
}
