//! The JSON Schema: the committed copy matches what the parser's types say,
//! and every example spec validates against it with a general-purpose
//! validator (the `jsonschema` crate), so schema and parser cannot drift apart.

use std::path::Path;

fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

#[test]
fn committed_schema_matches_the_parser() {
    let committed = std::fs::read_to_string(root().join("anomark-spec.schema.json")).unwrap();
    assert_eq!(
        committed,
        anomark::spec::schema_json(),
        "regenerate with `anomark schema > anomark-spec.schema.json`"
    );
}

#[test]
fn every_example_spec_validates_against_the_schema() {
    let schema: serde_json::Value = serde_json::from_str(&anomark::spec::schema_json()).unwrap();
    let validator = jsonschema::validator_for(&schema).unwrap();
    let mut n = 0;
    for entry in std::fs::read_dir(root().join("specs-examples")).unwrap() {
        let p = entry.unwrap().path();
        if p.extension().and_then(|e| e.to_str()) != Some("yaml") {
            continue;
        }
        n += 1;
        let text = std::fs::read_to_string(&p).unwrap();
        let value: serde_json::Value = serde_saphyr::from_str(&text).unwrap();
        let errors: Vec<String> = validator
            .iter_errors(&value)
            .map(|e| e.to_string())
            .collect();
        assert!(errors.is_empty(), "{}: {errors:?}", p.display());
        // And the parser accepts it too.
        anomark::spec::load(&p).unwrap();
    }
    assert!(n >= 3);
}

#[test]
fn the_schema_refuses_what_the_parser_refuses() {
    let schema: serde_json::Value = serde_json::from_str(&anomark::spec::schema_json()).unwrap();
    let validator = jsonschema::validator_for(&schema).unwrap();
    let text = std::fs::read_to_string(root().join("specs-examples/pump-housing-leak-screen.yaml"))
        .unwrap()
        .replace("  owner:", "  colour: red\n  owner:");
    let value: serde_json::Value = serde_saphyr::from_str(&text).unwrap();
    assert!(!validator.is_valid(&value));
}
