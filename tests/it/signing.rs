//! Signed run directories: verify accepts an untouched one and names every
//! difference in a touched one; openssl alone can check the signature.

use std::process::Command;

use crate::util::{rows, standard, Case, BIN};

fn signed_run() -> Case {
    let case = standard(&rows(300, 10, 11));
    case.clone().run_spec().success();
    case
}

fn verify(case: &Case) -> crate::util::Done {
    let out = Command::new(BIN)
        .current_dir(case.dir.path())
        .args(["verify", "out", "--pubkey", "key.pub.pem"])
        .output()
        .unwrap();
    crate::util::Done {
        keep: case.dir.clone(),
        code: out.status.code().unwrap(),
        stdout: String::from_utf8_lossy(&out.stdout).into(),
        stderr: String::from_utf8_lossy(&out.stderr).into(),
        dir: case.dir.path().to_path_buf(),
    }
}

#[test]
fn untouched_run_verifies() {
    let case = signed_run();
    let d = verify(&case);
    assert_eq!(d.code, 0, "{}", d.stderr);
    assert!(d
        .stdout
        // run.json, scores.csv, card.md, card.html, spec.yaml and ten figures.
        .starts_with("verified: out (15 files, signature by SHA256:"));
}

#[test]
fn one_byte_change_to_the_card_is_caught() {
    let case = signed_run();
    let p = case.path("out/card.md");
    let mut bytes = std::fs::read(&p).unwrap();
    let k = bytes.len() / 2;
    bytes[k] ^= 0x01;
    std::fs::write(&p, bytes).unwrap();
    let d = verify(&case);
    assert_eq!(d.code, 1, "{}", d.stderr);
    assert!(
        d.stderr.contains("`card.md` differs from the manifest"),
        "{}",
        d.stderr
    );
    assert!(!d.stderr.contains("`card.html`"), "{}", d.stderr);
}

#[test]
fn a_changed_manifest_breaks_the_signature() {
    let case = signed_run();
    let p = case.path("out/manifest.json");
    let text = std::fs::read_to_string(&p)
        .unwrap()
        .replacen("\"format\": 1", "\"format\": 2", 1);
    std::fs::write(&p, text).unwrap();
    let d = verify(&case);
    assert_eq!(d.code, 1);
    assert!(d.stderr.contains("signature"), "{}", d.stderr);
}

#[test]
fn an_added_file_and_a_missing_signature_are_named() {
    let case = signed_run();
    std::fs::write(case.path("out/extra.txt"), "x").unwrap();
    let d = verify(&case);
    assert_eq!(d.code, 1);
    assert!(
        d.stderr.contains("`extra.txt` is present but not covered"),
        "{}",
        d.stderr
    );
    std::fs::remove_file(case.path("out/manifest.sig")).unwrap();
    let d = verify(&case);
    assert_eq!(d.code, 4);
    assert!(d.stderr.contains("manifest.sig"), "{}", d.stderr);
}

#[test]
fn another_key_does_not_verify() {
    let case = signed_run();
    std::fs::remove_file(case.path("key.pem")).unwrap();
    std::fs::remove_file(case.path("key.pub.pem")).unwrap();
    let case = case.keys();
    let d = verify(&case);
    assert_eq!(d.code, 1);
    assert!(d.stderr.contains("does not match"), "{}", d.stderr);
}

#[test]
fn malformed_public_key_is_refused() {
    let case = signed_run();
    std::fs::write(
        case.path("key.pub.pem"),
        "-----BEGIN PUBLIC KEY-----\nAAAA\n-----END PUBLIC KEY-----\n",
    )
    .unwrap();
    let d = verify(&case);
    assert_eq!(d.code, 4);
    assert!(d.stderr.contains("SPKI"), "{}", d.stderr);
}

/// The openssl command line alone verifies anomark's signature (the README's
/// recipe). Skipped, with a printed note, where openssl is not installed.
#[test]
fn openssl_verifies_the_signature() {
    if Command::new("openssl").arg("version").output().is_err() {
        eprintln!("skip: openssl is not installed");
        return;
    }
    let case = signed_run();
    let sig = std::fs::read_to_string(case.path("out/manifest.sig")).unwrap();
    use base64::Engine;
    let raw = base64::engine::general_purpose::STANDARD
        .decode(sig.trim())
        .unwrap();
    std::fs::write(case.path("sig.bin"), raw).unwrap();
    let check = |manifest: &str| {
        Command::new("openssl")
            .current_dir(case.dir.path())
            .args([
                "pkeyutl",
                "-verify",
                "-pubin",
                "-inkey",
                "key.pub.pem",
                "-rawin",
                "-in",
                manifest,
                "-sigfile",
                "sig.bin",
            ])
            .output()
            .unwrap()
    };
    let ok = check("out/manifest.json");
    assert!(
        ok.status.success(),
        "{}",
        String::from_utf8_lossy(&ok.stderr)
    );
    // openssl also reads the private key anomark wrote.
    let pk = Command::new("openssl")
        .current_dir(case.dir.path())
        .args(["pkey", "-in", "key.pem", "-pubout"])
        .output()
        .unwrap();
    assert_eq!(
        String::from_utf8_lossy(&pk.stdout),
        std::fs::read_to_string(case.path("key.pub.pem")).unwrap()
    );
    // And refuses a changed manifest.
    let mut m = std::fs::read(case.path("out/manifest.json")).unwrap();
    m[10] ^= 1;
    std::fs::write(case.path("tampered.json"), m).unwrap();
    assert!(!check("tampered.json").status.success());
}

mod tampering {
    use proptest::prelude::*;

    fn copy_dir(from: &std::path::Path, to: &std::path::Path) {
        std::fs::create_dir_all(to).unwrap();
        for e in std::fs::read_dir(from).unwrap() {
            let e = e.unwrap();
            std::fs::copy(e.path(), to.join(e.file_name())).unwrap();
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 64, ..ProptestConfig::default() })]

        /// Any single-byte change to any signed file (the manifest and its
        /// signature included) is caught by verify.
        #[test]
        fn any_single_byte_change_is_caught(file in 0usize..6, pos in any::<prop::sample::Index>(), flip in 1u8..=255) {
            thread_local! {
                static RUN: (crate::util::Case, ed25519_dalek::VerifyingKey) = {
                    let case = super::signed_run();
                    let key = anomark::sign::load_public(&case.path("key.pub.pem")).unwrap();
                    (case, key)
                };
            }
            let (out, key) = RUN.with(|(case, key)| (case.path("out"), *key));
            let key = &key;
            let names = ["card.html", "card.md", "run.json", "scores.csv", "manifest.json", "manifest.sig"];
            let work = tempfile::tempdir().unwrap();
            copy_dir(&out, work.path());
            let target = work.path().join(names[file]);
            let mut bytes = std::fs::read(&target).unwrap();
            let i = pos.index(bytes.len());
            bytes[i] ^= flip;
            std::fs::write(&target, bytes).unwrap();
            prop_assert!(anomark::sign::verify_dir(work.path(), key).is_err(), "{} byte {} not caught", names[file], i);
        }
    }
}
