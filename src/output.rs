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
        // Files are written, flushed and hashed on all cores; the manifest
        // lists them in name order whatever the order of completion.
        use rayon::prelude::*;
        let mut digests: BTreeMap<String, crate::audit::hash::FileDigest> = self
            .files
            .par_iter()
            .map(|(name, parts)| {
                write_synced(&tmp.path().join(name), parts)?;
                let mut hasher = blake3::Hasher::new();
                for p in parts {
                    hasher.update(p);
                }
                Ok((
                    name.clone(),
                    crate::audit::hash::FileDigest {
                        bytes: parts.iter().map(|p| p.len() as u64).sum(),
                        blake3: hasher.finalize().to_hex().to_string(),
                    },
                ))
            })
            .collect::<Result<_>>()?;
        // Files an engine wrote: moved in, synced and hashed as they are.
        for (name, from) in &self.moved {
            let to = tmp.path().join(name);
            std::fs::rename(from, &to).map_err(|e| Error::io(&to, "moving into place", e))?;
            std::fs::File::open(&to)
                .and_then(|f| f.sync_all())
                .map_err(|e| Error::io(&to, "syncing", e))?;
            digests.insert(name.clone(), crate::audit::hash::file(&to)?);
        }
        let manifest = Manifest {
            format: 1,
            tool: crate::record::tool(),
            key_fingerprint: sign::fingerprint(&key.verifying_key()),
            files: digests,
        };
        let mut manifest_bytes = serde_json::to_vec_pretty(&manifest)
            .map_err(|e| Error::internal(format!("serialising the manifest: {e}")))?;
        manifest_bytes.push(b'\n');
        write_synced(&tmp.path().join(MANIFEST), &[&manifest_bytes])?;
        write_synced(
            &tmp.path().join(SIGNATURE),
            &[sign::sign(key, &manifest_bytes).as_bytes()],
        )?;

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

fn write_synced<B: AsRef<[u8]>>(path: &Path, parts: &[B]) -> Result<()> {
    use std::io::Write;
    let mut f = std::fs::File::create(path).map_err(|e| Error::io(path, "creating", e))?;
    parts
        .iter()
        .try_for_each(|p| f.write_all(p.as_ref()))
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
