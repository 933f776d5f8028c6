//! Fuzz target: one WebSocket text message through the ingest decoder
//! (`plotweave::wire::decode_batch`, as `server::handle_batch` calls it), with the properties of
//! `plotweave::fuzzing::check_ingest` asserted on the answer.

#![no_main]

use std::sync::LazyLock;

use libfuzzer_sys::fuzz_target;
use plotweave::config::Site;

static SITE: LazyLock<Site> = LazyLock::new(|| match plotweave::fuzzing::ingest_site() {
    Ok(s) => s,
    Err(e) => panic!("the fuzzing ingest site does not parse: {e}"),
});

fuzz_target!(|data: &[u8]| {
    // WebSocket text messages are UTF-8 by the protocol (tungstenite refuses anything else).
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Err(violation) = plotweave::fuzzing::check_ingest(text, &SITE) {
        panic!("property violated: {violation}\ninput: {text:?}");
    }
});
