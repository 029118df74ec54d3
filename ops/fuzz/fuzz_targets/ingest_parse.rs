//! Arbitrary bytes as an input file, through the parse and validation step
//! that intake runs on every file, against a small schema with a number, a
//! bounded number, a category and an optional category. Any panic is a bug:
//! a bad file must come back as a refusal. An accepted file must keep every
//! row, each of schema width, on one side of the split.
#![no_main]

use std::path::Path;
use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use tidegate::config::Config;
use tidegate::ingest::{self, Limits};
use tidegate::schema::{Schema, Vocabularies};

const CONFIG: &str = r#"
[data]
target = "y"
task = "regression"
holdout_fraction = 0.25
max_file_bytes = 65536
max_field_bytes = 64

[[data.columns]]
name = "id"
kind = "number"

[[data.columns]]
name = "city"
kind = "category"

[[data.columns]]
name = "temp"
kind = "number"
min = -50
max = 60

[[data.columns]]
name = "flag"
kind = "category"
required = false

[[data.columns]]
name = "y"
kind = "number"
"#;

fn setup() -> &'static (Schema, Vocabularies, Limits) {
    static S: OnceLock<(Schema, Vocabularies, Limits)> = OnceLock::new();
    S.get_or_init(|| {
        let config =
            Config::parse(CONFIG, Path::new("fuzz.toml")).expect("the fuzz schema is valid");
        let schema = Schema::from_config(&config);
        // One stored vocabulary value, so inputs reuse and extend it.
        let mut vocabs = Vocabularies::new();
        vocabs
            .entry(schema.index_of("city").expect("city"))
            .or_default()
            .code_or_insert("Oslo");
        let limits = Limits {
            max_file_bytes: config.data.max_file_bytes,
            max_field_bytes: config.data.max_field_bytes,
            holdout_fraction: 0.25,
        };
        (schema, vocabs, limits)
    })
}

fuzz_target!(|data: &[u8]| {
    let (schema, vocabs, limits) = setup();
    match ingest::parse(data, schema, vocabs, limits) {
        Ok(batch) => {
            assert_eq!(batch.train.width(), schema.width());
            assert_eq!(batch.holdout.width(), schema.width());
        }
        Err(refusal) => {
            assert!(refusal.total >= 1, "a refusal names at least one problem");
            assert!(refusal.problems.len() <= ingest::MAX_LISTED_PROBLEMS);
            let _ = refusal.first().to_string();
        }
    }
});
