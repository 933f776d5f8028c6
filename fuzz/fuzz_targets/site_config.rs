//! Fuzz target: one site file through the config parser and validator
//! (`plotweave::config::parse`, as `plotweave check --config` calls it), with the properties of
//! `plotweave::fuzzing::check_site_config` asserted on the answer.

#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    // `Site::load` reads the file with `read_to_string`, which refuses non-UTF-8 before parsing.
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Err(violation) = plotweave::fuzzing::check_site_config(text) {
        panic!("property violated: {violation}\ninput: {text:?}");
    }
});
