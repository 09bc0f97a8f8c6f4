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

/// The files of a run, in memory until [`RunFiles::commit`]. A file is held
/// as parts written one after another (a large file formatted in blocks on
/// all cores is never joined in memory).
#[derive(Debug, Default)]
pub struct RunFiles {
    files: BTreeMap<String, Vec<Vec<u8>>>,
    /// Files already written elsewhere (by an engine, in `staging`), moved
    /// into the run directory at [`RunFiles::commit`]: name → path.
    moved: BTreeMap<String, PathBuf>,
    /// The folder holding them until then (removed with it).
    staging: Option<Staging>,
}

/// A temporary folder beside a run directory's target, for files an engine
/// writes before the run directory is made; removed when dropped (and on
/// an interruption).
#[derive(Debug)]
pub struct Staging {
    dir: tempfile::TempDir,
    _registered: crate::cleanup::Registered,
}

impl Staging {
    /// A new staging folder in `target`'s parent folder.
    pub fn beside(target: &Path) -> Result<Staging> {
        let parent = match target.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => PathBuf::from("."),
        };
        std::fs::create_dir_all(&parent)
            .map_err(|e| Error::io(&parent, "creating output parent", e))?;
        let dir = tempfile::Builder::new()
            .prefix(".anomark-partial-scores-")
            .tempdir_in(&parent)
            .map_err(|e| Error::io(&parent, "creating temporary directory in", e))?;
        let registered = crate::cleanup::register(dir.path());
        Ok(Staging {
            dir,
            _registered: registered,
        })
    }

    /// The folder.
    pub fn path(&self) -> &Path {
        self.dir.path()
    }
}

impl RunFiles {
    /// Adds a file (a relative name with `/` separators).
    pub fn add(&mut self, name: &str, bytes: Vec<u8>) {
        self.add_parts(name, vec![bytes]);
    }

    /// Adds a file made of `parts`, in order.
    pub fn add_parts(&mut self, name: &str, parts: Vec<Vec<u8>>) {
        self.files.insert(name.to_string(), parts);
    }

    /// Adds the file `name` written at `path` in `staging` (kept until the
    /// commit moves it in).
    pub fn add_moved(&mut self, name: &str, path: PathBuf) {
        self.moved.insert(name.to_string(), path);
    }

    /// Keeps the staging folder of the moved files until the commit.
    pub fn keep_staging(&mut self, staging: Staging) {
        self.staging = Some(staging);
    }

    /// The names of the files moved in at the commit.
    pub fn moved_names(&self) -> Vec<String> {
        self.moved.keys().cloned().collect()
    }

    /// Removes a file, if added.
    pub fn remove(&mut self, name: &str) {
        self.files.remove(name);
    }

    /// A file's bytes, if added.
    pub fn get(&self, name: &str) -> Option<std::borrow::Cow<'_, [u8]>> {
        self.files.get(name).map(|parts| match parts.as_slice() {
            [one] => std::borrow::Cow::Borrowed(one.as_slice()),
            _ => std::borrow::Cow::Owned(parts.concat()),
        })
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
        // Removed on SIGINT or SIGTERM until renamed into place.
        let registered = crate::cleanup::register(tmp.path());

        for name in self.files.keys().chain(self.moved.keys()) {
            if let Some(dir) = tmp.path().join(name).parent() {
                std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, "creating", e))?;
            }
        }
        // Files are written and hashed on all cores, each file hashed while
        // it is written (scores.csv, the largest, would otherwise keep one
        // core busy while the other waits); the manifest lists them in name
        // order whatever the order of completion.
        use rayon::prelude::*;
        let mut written: Vec<(String, std::fs::File, crate::audit::hash::FileDigest)> = self
            .files
            .par_iter()
            .map(|(name, parts)| {
                let path = tmp.path().join(name);
                let (file, digest) = rayon::join(
                    || write_unsynced(&path, parts),
                    || crate::audit::hash::parts(parts),
                );
                Ok((name.clone(), file?, digest))
            })
            .collect::<Result<_>>()?;
        // Files an engine wrote: moved in, hashed as they are, and flushed
        // with the others.
        for (name, from) in &self.moved {
            let to = tmp.path().join(name);
            std::fs::rename(from, &to).map_err(|e| Error::io(&to, "moving into place", e))?;
            let digest = crate::audit::hash::file(&to)?;
            let file = std::fs::File::open(&to).map_err(|e| Error::io(&to, "reading", e))?;
            written.push((name.clone(), file, digest));
        }
        let digests = sync_all_at_once(tmp.path(), written)?;
        let manifest = Manifest {
            format: 1,
            tool: crate::record::tool(),
            key_fingerprint: sign::fingerprint(&key.verifying_key()),
            files: digests,
        };
        let mut manifest_bytes = serde_json::to_vec_pretty(&manifest)
            .map_err(|e| Error::internal(format!("serialising the manifest: {e}")))?;
        manifest_bytes.push(b'\n');
        let signature = sign::sign(key, &manifest_bytes);
        let last = [
            (MANIFEST, manifest_bytes.as_slice()),
            (SIGNATURE, signature.as_bytes()),
        ]
        .into_iter()
        .map(|(name, bytes)| {
            let file = write_unsynced(&tmp.path().join(name), &[bytes])?;
            Ok((name.to_string(), file, ()))
        })
        .collect::<Result<Vec<_>>>()?;
        sync_all_at_once(tmp.path(), last)?;

        fail_point("before-rename")?;
        pause_point("before-rename");
        if target.is_dir() {
            // An empty directory (checked above) is replaced.
            std::fs::remove_dir(target).map_err(|e| Error::io(target, "replacing", e))?;
        }
        registered.finish(|| {
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
        })
    }
}

/// Creates `path` and writes `parts` to it, not yet flushed to the disk.
fn write_unsynced<B: AsRef<[u8]>>(path: &Path, parts: &[B]) -> Result<std::fs::File> {
    use std::io::Write;
    let mut f = std::fs::File::create(path).map_err(|e| Error::io(path, "creating", e))?;
    parts
        .iter()
        .try_for_each(|p| f.write_all(p.as_ref()))
        .map_err(|e| Error::io(path, "writing", e))?;
    Ok(f)
}

/// Files flushed to the disk at most this many at a time.
const SYNCS_IN_FLIGHT: usize = 64;

/// Flushes every written file to the disk, each from its own thread (up to
/// [`SYNCS_IN_FLIGHT`] at once): a journalling file system commits the
/// flushes that wait together in one journal commit, where flushing the
/// files one after another waits for one commit each. Returns the digests
/// by name once every file is on the disk.
fn sync_all_at_once<D: Send>(
    dir: &Path,
    written: Vec<(String, std::fs::File, D)>,
) -> Result<BTreeMap<String, D>> {
    let mut out = BTreeMap::new();
    let mut written = written.into_iter().peekable();
    while written.peek().is_some() {
        let batch: Vec<_> = written.by_ref().take(SYNCS_IN_FLIGHT).collect();
        let synced: Vec<Result<(String, D)>> = std::thread::scope(|scope| {
            let handles: Vec<_> = batch
                .into_iter()
                .map(|(name, file, digest)| {
                    scope.spawn(move || {
                        file.sync_all()
                            .map(|()| (name.clone(), digest))
                            .map_err(|e| Error::io(dir.join(&name), "writing", e))
                    })
                })
                .collect();
            handles
                .into_iter()
                .map(|h| {
                    h.join()
                        .unwrap_or_else(|_| Err(Error::internal("a file flush panicked")))
                })
                .collect()
        });
        for r in synced {
            let (name, digest) = r?;
            out.insert(name, digest);
        }
    }
    Ok(out)
}

/// Test hook: `ANOMARK_FAIL_AT=<point>` makes the run fail at that point, to
/// prove that a failed run leaves nothing behind.
fn fail_point(point: &str) -> Result<()> {
    if std::env::var("ANOMARK_FAIL_AT").ok().as_deref() == Some(point) {
        return Err(Error::internal(format!("injected failure at `{point}`")));
    }
    Ok(())
}

/// Test hook: `ANOMARK_PAUSE_AT=<point>` makes the process wait 30 s at that
/// point, with its temporary in place, to prove that an interruption there
/// leaves nothing behind.
pub fn pause_point(point: &str) {
    if std::env::var("ANOMARK_PAUSE_AT").ok().as_deref() == Some(point) {
        std::thread::sleep(std::time::Duration::from_secs(30));
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A file added in parts is read back, written and listed in the
    /// manifest exactly as the same bytes added whole; the listed hash is the
    /// `blake3` crate's hash of the whole file.
    #[test]
    fn a_file_in_parts_is_one_file() {
        let key = SigningKey::from_bytes(&[7u8; 32]);
        let parts: Vec<Vec<u8>> = vec![
            b"id,score\n".to_vec(),
            vec![],
            b"a,1\nb,2\n".to_vec(),
            b"c,3\n".to_vec(),
        ];
        let whole = parts.concat();
        let dir = tempfile::tempdir().unwrap();
        let mut files = RunFiles::default();
        files.add_parts("parts.csv", parts);
        files.add("whole.csv", whole.clone());
        assert_eq!(files.get("parts.csv").as_deref(), Some(whole.as_slice()));
        let out = files.commit(&dir.path().join("run"), &key).unwrap();
        assert_eq!(std::fs::read(out.join("parts.csv")).unwrap(), whole);
        let manifest: serde_json::Value =
            serde_json::from_slice(&std::fs::read(out.join(MANIFEST)).unwrap()).unwrap();
        let listed = &manifest["files"];
        assert_eq!(listed["parts.csv"], listed["whole.csv"]);
        assert_eq!(listed["parts.csv"]["bytes"], whole.len());
        assert_eq!(
            listed["parts.csv"]["blake3"],
            blake3::hash(&whole).to_hex().as_str()
        );
    }
}
