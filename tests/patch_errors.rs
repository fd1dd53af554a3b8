//! Every file in tests/bad/ must be rejected with a message that contains the substring on
//! its first line (`# expect: ...`) and names the offending key path. The second line of each
//! file says, in words, what is wrong with it.

use std::path::{Path, PathBuf};

fn bad_files() -> Vec<PathBuf> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad");
    let mut v: Vec<PathBuf> = std::fs::read_dir(&dir)
        .expect("tests/bad exists")
        .map(|e| e.expect("readable entry").path())
        .filter(|p| p.extension().is_some_and(|x| x == "toml"))
        .collect();
    v.sort();
    v
}

#[test]
fn every_bad_patch_is_rejected_with_its_message() {
    let files = bad_files();
    assert!(files.len() >= 20, "only {} bad patches", files.len());
    let mut failures = Vec::new();
    for f in &files {
        let text = std::fs::read_to_string(f).unwrap();
        let mut lines = text.lines();
        let expect = lines
            .next()
            .and_then(|l| l.strip_prefix("# expect: "))
            .unwrap_or_else(|| panic!("{}: first line must be '# expect: ...'", f.display()));
        let why = lines.next().unwrap_or("");
        assert!(
            why.starts_with("# ") && why.len() > 8,
            "{}: second line must say what is wrong",
            f.display()
        );
        let err = match railsong::patch::load(f, &[]) {
            Ok(_) => {
                failures.push(format!("{}: accepted", f.display()));
                continue;
            }
            Err(e) => e,
        };
        let msg = err.to_string();
        let file = f.display().to_string();
        if !msg.starts_with(&format!("{file}: ")) {
            failures.push(format!(
                "{}: message does not start with the file: {msg}",
                f.display()
            ));
        }
        if !msg.contains(expect) {
            failures.push(format!(
                "{}:\n  expected: {expect}\n  got:      {msg}",
                f.display()
            ));
        }
        if err.path().is_empty() {
            // Only errors about the document as a whole (a syntax error, an unknown or
            // missing top-level section) have no key path; those must give a line or name
            // the section.
            assert!(
                err.line().is_some() || msg.contains("'rails'"),
                "{}: no key path and no line: {msg}",
                f.display()
            );
        } else {
            if !expect.contains(err.path()) {
                failures.push(format!(
                    "{}: the expected text does not name the key path {}",
                    f.display(),
                    err.path()
                ));
            }
            if !msg.contains(&format!("{}: ", err.path())) {
                failures.push(format!(
                    "{}: message lacks the key path: {msg}",
                    f.display()
                ));
            }
        }
        assert_eq!(err.exit_code(), 2);
    }
    assert!(failures.is_empty(), "\n{}", failures.join("\n"));
}

/// The line in a message is the line of the offending key in the file.
#[test]
fn line_numbers_point_at_the_key() {
    let f = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad/bad_resistance_code.toml");
    let text = std::fs::read_to_string(&f).unwrap();
    let want = text
        .lines()
        .position(|l| l.contains("\"47q\""))
        .map(|i| i + 1)
        .unwrap();
    let err = railsong::patch::load(&f, &[]).unwrap_err();
    assert_eq!(err.line(), Some(want));
}

#[test]
fn a_missing_file_is_a_read_error() {
    let err = railsong::patch::load(Path::new("no/such/patch.toml"), &[]).unwrap_err();
    assert!(matches!(err, railsong::patch::PatchError::Read { .. }));
    assert!(err
        .to_string()
        .starts_with("no/such/patch.toml: cannot read"));
    assert_eq!(err.exit_code(), 2);
}

/// Arbitrary damage to valid patches must give an error or a patch, never a panic. A fixed
/// xorshift generator keeps the run repeatable.
#[test]
fn damaged_patches_never_panic() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/good");
    let mut texts: Vec<String> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "toml"))
        .map(|p| std::fs::read_to_string(p).unwrap())
        .collect();
    texts.sort();
    let mut state: u64 = 0x9e37_79b9_7f4a_7c15;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    let junk: Vec<char> = "=[]{}\",.#\n 0123456789-+eE_kKmMuµΩnpRrVHzsdB%abcxyz\u{0}\\'"
        .chars()
        .collect();
    let mut accepted = 0;
    for round in 0..3000 {
        let src = &texts[round % texts.len()];
        let mut chars: Vec<char> = src.chars().collect();
        let edits = 1 + (next() % 4) as usize;
        for _ in 0..edits {
            if chars.is_empty() {
                break;
            }
            let at = (next() % chars.len() as u64) as usize;
            match next() % 4 {
                0 => {
                    let len = ((next() % 12) as usize).min(chars.len() - at);
                    chars.drain(at..at + len);
                }
                1 => chars.insert(at, junk[(next() % junk.len() as u64) as usize]),
                2 => chars[at] = junk[(next() % junk.len() as u64) as usize],
                _ => chars.truncate(at),
            }
        }
        let text: String = chars.into_iter().collect();
        if railsong::patch::parse_str(&text, "fuzz.toml", Path::new("."), &[]).is_ok() {
            accepted += 1;
        }
    }
    // Most single edits land in comments or keep the value valid; some must break it.
    assert!(accepted < 3000);
}
