//! Ties a run to the version-control state of its spec: when the spec sits in
//! a git repository, the commit checked out and whether the work tree had
//! changes when the run began (so the run's own ledger entry does not count). Reads only; a missing git or a spec outside a repository gives
//! no provenance rather than an error.

use std::path::Path;
use std::process::Command;

/// The repository state of the spec's directory.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct Provenance {
    /// The commit checked out (full hash).
    pub commit: String,
    /// Whether tracked or untracked (not ignored) files differed from it.
    pub dirty: bool,
}

fn git(dir: &Path, args: &[&str]) -> Option<String> {
    // Without optional locks `git status` leaves the index as it is (it
    // would otherwise refresh it, writing into the user's repository and
    // taking a lock a concurrent git command of theirs could meet).
    let out = Command::new("git")
        .arg("--no-optional-locks")
        .arg("-C")
        .arg(dir)
        .args(args)
        .output()
        .ok()?;
    out.status
        .success()
        .then(|| String::from_utf8_lossy(&out.stdout).into_owned())
}

/// The provenance of the spec at `spec`, if it is in a git work tree.
pub fn of(spec: &Path) -> Option<Provenance> {
    let dir = match spec.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    let commit = git(dir, &["rev-parse", "--verify", "HEAD"])?
        .trim()
        .to_string();
    if commit.len() < 40 {
        return None;
    }
    let status = git(dir, &["status", "--porcelain"])?;
    Some(Provenance {
        commit,
        dirty: !status.trim().is_empty(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn outside_a_repository_there_is_none() {
        let d = tempfile::tempdir().unwrap();
        let spec = d.path().join("s.yaml");
        std::fs::write(&spec, "x").unwrap();
        assert_eq!(of(&spec), None);
    }

    #[test]
    fn inside_a_repository_commit_and_dirt_are_recorded() {
        if Command::new("git").arg("--version").output().is_err() {
            eprintln!("skip: git is not installed");
            return;
        }
        let d = tempfile::tempdir().unwrap();
        let run = |args: &[&str]| {
            let ok = Command::new("git")
                .arg("-C")
                .arg(d.path())
                .args(args)
                .output()
                .unwrap()
                .status
                .success();
            assert!(ok, "git {args:?}");
        };
        run(&["init", "-q"]);
        std::fs::write(d.path().join("s.yaml"), "x").unwrap();
        run(&["add", "s.yaml"]);
        run(&[
            "-c",
            "user.name=t",
            "-c",
            "user.email=t@example.invalid",
            "commit",
            "-qm",
            "t",
        ]);
        // A file touched with the same content: a plain `git status` would
        // refresh the index's stat data and rewrite it; reading the state
        // must leave the repository's files as they were.
        let index = std::fs::read(d.path().join(".git/index")).unwrap();
        let later = std::time::SystemTime::now() + std::time::Duration::from_secs(5);
        std::fs::File::options()
            .write(true)
            .open(d.path().join("s.yaml"))
            .unwrap()
            .set_modified(later)
            .unwrap();
        let p = of(&d.path().join("s.yaml")).unwrap();
        assert_eq!(p.commit.len(), 40);
        assert!(!p.dirty);
        assert_eq!(std::fs::read(d.path().join(".git/index")).unwrap(), index);
        std::fs::write(d.path().join("s.yaml"), "y").unwrap();
        assert!(of(&d.path().join("s.yaml")).unwrap().dirty);
    }
}
