//! Bad input never panics: arbitrary and truncated YAML gives diagnostics, not a crash.

use plumb::load::load_catalog_texts;
use plumb::source::SourceMap;
use proptest::prelude::*;

fn load_and_resolve(text: &str) {
    let mut sources = SourceMap::new();
    let (raw, _) = load_catalog_texts(&[("fuzz.yaml", text)], &mut sources);
    let _ = plumb::resolve::resolve(&sources, &raw);
}

#[test]
fn every_prefix_of_the_demo_catalog_loads_without_panicking() {
    let text = plumb::demo::CATALOG[0].1;
    for end in (0..text.len()).filter(|i| text.is_char_boundary(*i)) {
        load_and_resolve(&text[..end]);
    }
}

#[test]
fn odd_shapes_give_diagnostics() {
    for text in [
        "",
        "~",
        "- a\n- b",
        "metrics: 3",
        "metrics: [1, 2]",
        "metrics:\n  - name: [a, b]",
        "metrics:\n  - {name: x, window: 3}",
        "experiments:\n  - name: e\n    split: [1, 2]",
        "experiments:\n  - name: e\n    split: {a: -1, b: x}",
        "units:\n  - &a {name: u}\n  - *a",
        "metrics:\n  - name: m\n    events: t\n    per_unit: count\n    window: [\"0d\", \"\"]",
        "units:\n  - name: \"\u{1F331}\"",
    ] {
        let mut sources = SourceMap::new();
        let (raw, mut diags) = load_catalog_texts(&[("odd.yaml", text)], &mut sources);
        if let Err(more) = plumb::resolve::resolve(&sources, &raw) {
            diags.extend(more);
        }
        // Rendering must not panic either, whatever the spans.
        let _ = plumb::diagnostics::render_plain(&sources, &diags);
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]
    #[test]
    fn arbitrary_text_never_panics(text in "[ -~\n]{0,200}") {
        load_and_resolve(&text);
    }

    /// Timestamps and durations from flags and YAML: any text at all, non-ASCII included.
    #[test]
    fn arbitrary_times_and_durations_never_panic(text in "\\PC{0,24}") {
        let _ = plumb::time::Timestamp::parse(&text);
        let _ = plumb::time::parse_duration(&text);
    }

    #[test]
    fn mutated_catalog_never_panics(pos in 0usize..2000, insert in "[:\\-\\[\\]{}'\" \na-z0-9]{1,4}") {
        let base = plumb::demo::CATALOG[0].1;
        let mut pos = pos.min(base.len());
        while !base.is_char_boundary(pos) { pos -= 1; }
        let text = format!("{}{}{}", &base[..pos], insert, &base[pos..]);
        let mut sources = SourceMap::new();
        let (raw, mut diags) = load_catalog_texts(&[("m.yaml", &text)], &mut sources);
        if let Err(more) = plumb::resolve::resolve(&sources, &raw) { diags.extend(more); }
        let _ = plumb::diagnostics::render_plain(&sources, &diags);
    }
}
