//! Bounded fuzzing with proptest: arbitrary bytes fed to the spec parser and
//! to the CSV loader must give a result or an error, never a panic. Run longer
//! with `PROPTEST_CASES=100000 cargo test --test it fuzz`.

use proptest::prelude::*;

const GOOD_SPEC: &str = "format: 1
data:
  path: data.csv
  label: {column: y, normal: n, anomaly: a}
  features: [f, g]
split:
  protocol: {seed: 1}
detectors: [independent-gaussian]
card: {title: t, owner: o, intended-use: u}
";

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn spec_parser_never_panics_on_bytes(bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        let _ = anomark::spec::parse(std::path::Path::new("fuzz.yaml"), bytes);
    }

    #[test]
    fn spec_parser_never_panics_on_mutated_specs(pos in 0usize..GOOD_SPEC.len(), insert in "[ -~\\n:\\[\\]{}&*!|>-]{0,12}") {
        let mut s = GOOD_SPEC.to_string();
        let mut pos = pos;
        while !s.is_char_boundary(pos) { pos -= 1; }
        s.insert_str(pos, &insert);
        let _ = anomark::spec::parse(std::path::Path::new("fuzz.yaml"), s.into_bytes());
    }

    #[test]
    fn csv_loader_never_panics(body in prop::collection::vec(any::<u8>(), 0..300), csvish in "([0-9a-z.,\\-\"\\n]{0,8}){0,20}") {
        let dir = tempfile::tempdir().unwrap();
        let spec = dir.path().join("s.yaml");
        std::fs::write(&spec, GOOD_SPEC).unwrap();
        for data in [body.clone(), format!("f,g,y\n{csvish}").into_bytes()] {
            std::fs::write(dir.path().join("data.csv"), &data).unwrap();
            let plan = anomark::spec::load(&spec).unwrap();
            let _ = anomark::data::load(&plan);
        }
    }
}
