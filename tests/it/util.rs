//! A chainable test case: a temporary directory with files, one `anomark`
//! invocation, and assertions on its exit code, output and files.

use std::path::PathBuf;
use std::process::Command;
use std::rc::Rc;

use rand_chacha::rand_core::{Rng, SeedableRng};

pub const BIN: &str = env!("CARGO_BIN_EXE_anomark");

/// A run of the case's spec and key into `out`: `run spec.yaml --key
/// key.pem --out out` (the tests' one copy of them).
pub const RUN: [&str; 6] = ["run", "spec.yaml", "--key", "key.pem", "--out", "out"];

/// The usual run's arguments, test split sealed: [`RUN`] `--no-wall-clock`.
pub const SEALED_RUN: [&str; 7] = {
    let mut args = [""; 7];
    let mut i = 0;
    while i < RUN.len() {
        args[i] = RUN[i];
        i += 1;
    }
    args[6] = "--no-wall-clock";
    args
};

#[derive(Clone)]
pub struct Case {
    pub dir: Rc<tempfile::TempDir>,
    args: Vec<String>,
    env: Vec<(String, String)>,
}

pub struct Done {
    /// Keeps the case's directory alive while the result is inspected.
    #[allow(dead_code)]
    pub keep: Rc<tempfile::TempDir>,
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
    pub dir: PathBuf,
}

impl Case {
    pub fn new() -> Self {
        Case {
            dir: Rc::new(tempfile::tempdir().unwrap()),
            args: vec![],
            env: vec![],
        }
    }

    pub fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    pub fn file(self, name: &str, text: impl AsRef<[u8]>) -> Self {
        let p = self.path(name);
        if let Some(d) = p.parent() {
            std::fs::create_dir_all(d).unwrap();
        }
        std::fs::write(p, text).unwrap();
        self
    }

    /// Writes `key.pem` and `key.pub.pem`.
    pub fn keys(self) -> Self {
        let out = Command::new(BIN)
            .current_dir(self.dir.path())
            .args(["keygen", "--private", "key.pem", "--public", "key.pub.pem"])
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        self
    }

    pub fn args<I: IntoIterator<Item = S>, S: Into<String>>(mut self, args: I) -> Self {
        self.args = args.into_iter().map(Into::into).collect();
        self
    }

    pub fn env(mut self, k: &str, v: &str) -> Self {
        self.env.push((k.into(), v.into()));
        self
    }

    /// The usual run, test split sealed: `run spec.yaml --key key.pem --out
    /// out --no-wall-clock`.
    pub fn run_sealed(self) -> Self {
        self.args(SEALED_RUN)
    }

    /// The usual final run: `run spec.yaml --key key.pem --out out
    /// --no-wall-clock --open-test`.
    pub fn run_spec(mut self) -> Self {
        self = self.run_sealed();
        self.args.push("--open-test".into());
        self
    }

    /// Records `out/NAME`'s new hash in `out/manifest.json` and signs the
    /// manifest again with `key.pem`, as an author who edited a signed run
    /// directory could.
    pub fn resign(&self, name: &str) {
        let manifest_path = self.path("out/manifest.json");
        let mut m: anomark::sign::Manifest =
            serde_json::from_slice(&std::fs::read(&manifest_path).unwrap()).unwrap();
        m.files.insert(
            name.into(),
            anomark::audit::hash::file(&self.path(&format!("out/{name}"))).unwrap(),
        );
        let mut bytes = serde_json::to_vec_pretty(&m).unwrap();
        bytes.push(b'\n');
        std::fs::write(&manifest_path, &bytes).unwrap();
        let key = anomark::sign::load_private(&self.path("key.pem")).unwrap();
        std::fs::write(
            self.path("out/manifest.sig"),
            anomark::sign::sign(&key, &bytes),
        )
        .unwrap();
    }

    pub fn exec(&self) -> Done {
        let mut c = Command::new(BIN);
        c.current_dir(self.dir.path()).args(&self.args);
        for (k, v) in &self.env {
            c.env(k, v);
        }
        let out = c.output().unwrap();
        Done {
            keep: self.dir.clone(),
            code: out.status.code().unwrap_or(-1),
            stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
            dir: self.dir.path().to_path_buf(),
        }
    }

    /// Like [`Case::exec`], but kills the process and fails the test when it
    /// has not ended within `limit` (for inputs that could be read forever).
    pub fn exec_within(&self, limit: std::time::Duration) -> Done {
        let mut c = Command::new(BIN);
        c.current_dir(self.dir.path())
            .args(&self.args)
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped());
        for (k, v) in &self.env {
            c.env(k, v);
        }
        let mut child = c.spawn().unwrap();
        let start = std::time::Instant::now();
        while child.try_wait().unwrap().is_none() {
            if start.elapsed() > limit {
                let _ = child.kill();
                let _ = child.wait();
                panic!(
                    "`anomark {}` did not end within {limit:?}",
                    self.args.join(" ")
                );
            }
            std::thread::sleep(std::time::Duration::from_millis(20));
        }
        let out = child.wait_with_output().unwrap();
        Done {
            keep: self.dir.clone(),
            code: out.status.code().unwrap_or(-1),
            stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
            dir: self.dir.path().to_path_buf(),
        }
    }

    pub fn success(&self) -> Done {
        let d = self.exec();
        assert_eq!(d.code, 0, "stderr: {}", d.stderr);
        d
    }

    /// Runs, expects exit `code` and a message containing every piece.
    pub fn fails(&self, code: i32, pieces: &[&str]) -> Done {
        let d = self.exec();
        assert_eq!(d.code, code, "stdout: {}\nstderr: {}", d.stdout, d.stderr);
        assert!(d.stderr.starts_with("anomark: "), "{}", d.stderr);
        for p in pieces {
            assert!(d.stderr.contains(p), "`{p}` not in: {}", d.stderr);
        }
        d
    }
}

impl Done {
    pub fn read(&self, name: &str) -> String {
        std::fs::read_to_string(self.dir.join(name)).unwrap()
    }

    pub fn json(&self, name: &str) -> serde_json::Value {
        serde_json::from_str(&self.read(name)).unwrap()
    }
}

/// The spec used by most tests; `extra` replaces nothing, it is appended to `data:`.
pub fn spec(features: &[&str], split: &str) -> String {
    let list = features
        .iter()
        .map(|f| format!("    - \"{f}\"\n"))
        .collect::<String>();
    format!(
        "format: 1
data:
  path: data.csv
  id-column: id
  label:
    column: label
    normal: normal
    anomaly: anomaly
  features:
{list}split:
{split}
detectors: [independent-gaussian, multivariate-gaussian]
threshold: max-f1
card:
  title: Test card
  owner: Tests
  intended-use: Testing
"
    )
}

pub const PROTOCOL: &str = "  protocol:\n    seed: 7";

/// Rows of (id, features, is_anomaly).
pub type Rows = Vec<(String, Vec<f64>, bool)>;

/// The rows with feature `c` set to 4 in every row (a constant feature).
pub fn with_constant_c(rows: Rows) -> Rows {
    rows.into_iter()
        .map(|(id, mut x, a)| {
            x[2] = 4.0;
            (id, x, a)
        })
        .collect()
}

/// Seeded Gaussian rows: normals N(0, 1) in three features with a correlation
/// between a and b; anomalies shifted by 3 in a and −3 in b. Values are
/// written with 6 decimals, so the CSV round-trips exactly as text.
pub fn rows(normal: usize, anomalies: usize, seed: u64) -> Rows {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut unif = move || ((rng.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64;
    let mut gauss = move || {
        let (u, v) = (unif(), unif());
        (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
    };
    let round = |v: f64| (v * 1e6).round() / 1e6;
    let mut out = Vec::new();
    for i in 0..normal + anomalies {
        let anomalous = i >= normal;
        let (z1, z2, z3) = (gauss(), gauss(), gauss());
        let (mut a, mut b) = (z1, 0.7 * z1 + 0.714 * z2);
        if anomalous {
            a += 3.0;
            b -= 3.0;
        }
        out.push((
            format!("r{i}"),
            vec![round(a), round(b), round(z3)],
            anomalous,
        ));
    }
    out
}

pub fn csv(header: &[&str], rows: &Rows) -> String {
    let mut s = format!("id,{},label\n", header.join(","));
    for (id, x, a) in rows {
        s.push_str(id);
        for v in x {
            s.push_str(&format!(",{v:.6}"));
        }
        s.push_str(if *a { ",anomaly\n" } else { ",normal\n" });
    }
    s
}

/// A ready case: `data.csv` with the given rows, `spec.yaml`, and keys.
pub fn standard(rows: &Rows) -> Case {
    Case::new()
        .file("data.csv", csv(&["a", "b", "c"], rows))
        .file("spec.yaml", spec(&["a", "b", "c"], PROTOCOL))
        .keys()
}
