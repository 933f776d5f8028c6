//! The fuzz corpora and regression inputs under `fuzz/` run through the same property checks
//! as the fuzz targets (`plotweave::fuzzing`), on stable and without a fuzzer, in every
//! `cargo test`.
//!
//! Every file of `fuzz/corpus/<target>/` and `fuzz/regressions/<target>/` must pass the
//! target's checks. Hand-written seeds are named for what they must do: `ok-*` must be
//! accepted (a batch that decodes, a site that is valid), `bad-*` refused (for ingest,
//! `bad-<code>-*` refused with that code); files named by the fuzzer (hashes) only need to pass
//! the checks. A regression file is named after what broke (see `fuzz/README.md`).

use std::path::{Path, PathBuf};

use plotweave::fuzzing::{self, ConfigOutcome, IngestOutcome};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

/// Every file of `fuzz/corpus/<target>` and `fuzz/regressions/<target>`, with its bytes.
fn inputs(target: &str) -> Vec<(String, Vec<u8>)> {
    let mut out = Vec::new();
    for kind in ["corpus", "regressions"] {
        let dir = root().join("fuzz").join(kind).join(target);
        let entries = match std::fs::read_dir(&dir) {
            Ok(e) => e,
            Err(e) => panic!("cannot read {}: {e}", dir.display()),
        };
        for entry in entries {
            let path = entry.expect("directory entry").path();
            if !path.is_file() {
                continue;
            }
            let bytes = std::fs::read(&path).expect("read corpus file");
            let name = path
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default();
            out.push((name, bytes));
        }
    }
    out.sort();
    out
}

/// The expectation a file's name states: `Some(true)` for `ok-*`, `Some(false)` for `bad-*`.
fn expected(name: &str) -> Option<bool> {
    if name.starts_with("ok-") {
        Some(true)
    } else if name.starts_with("bad-") {
        Some(false)
    } else {
        None
    }
}

#[test]
fn ingest_batch_corpus_and_regressions_keep_their_properties() {
    let site = fuzzing::ingest_site().expect("the fuzzing ingest site parses");
    let files = inputs("ingest_batch");
    assert!(files.len() >= 10, "corpus too small: {} files", files.len());
    let (mut accepted, mut failures) = (0, Vec::new());
    for (name, bytes) in &files {
        // The target skips non-UTF-8 input (WebSocket text is UTF-8); so does this test.
        let Ok(text) = std::str::from_utf8(bytes) else {
            continue;
        };
        match fuzzing::check_ingest(text, &site) {
            Err(v) => failures.push(format!("{name}: {v}")),
            Ok(outcome) => {
                let ok = matches!(outcome, IngestOutcome::Accepted { .. });
                accepted += usize::from(ok);
                if let Some(want) = expected(name)
                    && want != ok
                {
                    failures.push(format!(
                        "{name}: expected accepted = {want}, got {outcome:?}"
                    ));
                }
                if let IngestOutcome::Rejected(code) = outcome
                    && let Some(rest) = name.strip_prefix("bad-")
                    && !rest.starts_with(&format!("{}-", code.as_str()))
                    && !rest.starts_with(&format!("{}.", code.as_str()))
                {
                    failures.push(format!("{name}: refused with {code}, not the named code"));
                }
            }
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
    assert!(accepted >= 4, "only {accepted} corpus batches are accepted");
}

#[test]
fn site_config_corpus_and_regressions_keep_their_properties() {
    // `plotweave` parses its site file on the main thread (8 MiB of stack). The corpus holds
    // tables and arrays nested up to the toml crate's recursion limit, which an unoptimised
    // build cannot parse within a test thread's default 2 MiB; give the check the main
    // thread's stack.
    let checked = std::thread::Builder::new()
        .stack_size(8 << 20)
        .spawn(check_site_config_files)
        .expect("spawn the checking thread")
        .join();
    if let Err(panic) = checked {
        std::panic::resume_unwind(panic);
    }
}

fn check_site_config_files() {
    let files = inputs("site_config");
    assert!(files.len() >= 8, "corpus too small: {} files", files.len());
    let (mut valid, mut failures) = (0, Vec::new());
    for (name, bytes) in &files {
        // `Site::load` refuses non-UTF-8 before parsing; the target skips it, so does this test.
        let Ok(text) = std::str::from_utf8(bytes) else {
            continue;
        };
        match fuzzing::check_site_config(text) {
            Err(v) => failures.push(format!("{name}: {v}")),
            Ok(outcome) => {
                let ok = matches!(outcome, ConfigOutcome::Valid { .. });
                valid += usize::from(ok);
                if let Some(want) = expected(name)
                    && want != ok
                {
                    failures.push(format!("{name}: expected valid = {want}, got {outcome:?}"));
                }
            }
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
    assert!(valid >= 4, "only {valid} corpus sites are valid");
}

#[test]
fn the_shipped_site_files_keep_the_config_properties() {
    // The corpus holds copies of these as seeds; the originals are checked too, so an edit to
    // one that breaks a property (e.g. a key `render_site` does not know yet) shows here.
    for source in [
        "examples/kestrel-bay-site.toml",
        "service/src/demo_site.toml",
    ] {
        let text = std::fs::read_to_string(root().join(source)).expect("read site file");
        match fuzzing::check_site_config(&text) {
            Ok(ConfigOutcome::Valid { .. }) => {}
            other => panic!("{source}: {other:?}"),
        }
    }
}
