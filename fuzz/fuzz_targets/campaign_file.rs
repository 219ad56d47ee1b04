//! Campaign files: any text must parse to a campaign or to an error whose rendering
//! (file, line, column, the line itself and a caret row) is produced without a panic.
#![no_main]

use std::path::Path;

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    // Campaign files are read as UTF-8 text; invalid bytes never reach the parser, so
    // the lossy conversion keeps every input useful instead of discarding it.
    let text = String::from_utf8_lossy(data);
    match tarn::spec::Campaign::parse("fuzz.toml", &text, Path::new("/nonexistent")) {
        Ok(campaign) => {
            // A campaign that parses must also describe itself without a panic.
            let _ = campaign.stages().len();
        }
        Err(e) => {
            let shown = e.to_string();
            assert!(
                shown.starts_with("fuzz.toml"),
                "error lacks the file: {shown}"
            );
        }
    }
});
