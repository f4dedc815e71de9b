//! The rules of DEVELOPERS.md that can be checked by reading the sources. Each check is a
//! grep-level rule, stated beside it with what it cannot see; a rule that needs type
//! information (say, arithmetic between two f64 variables in the CLI) is out of reach here and
//! left to review.
//!
//! 1. The CLI never computes a number itself: no floating-point arithmetic in `cli/src`
//!    outside its tests (the patterns are listed at [`CLI_ARITHMETIC`]).
//! 2. Every file write goes through the engine's atomic writer: no `fs::write`, `File::create`,
//!    `OpenOptions` or `fs::copy` in the `src/` of any workspace crate except
//!    `engine/src/output.rs`, outside test code.
//! 3. The project stands alone: no file mentions the outside document it once cited or the
//!    folder it lived in (see [`FORBIDDEN_MENTIONS`]).
//! 4. No constant is silenced with `let _ = (A, B);`.
//! 5. The CLI never panics on a closed output stream: it prints only through `outln!` and
//!    `errln!` (no `println!`, `eprintln!`, `print!`, `eprint!`, `dbg!` in `cli/src`).
//!
//! A few violations predate these checks and are being removed by issue 10 (points 2 and 4);
//! they are listed by file and line text in [`KNOWN`]. An entry that no longer matches fails the
//! test too, so the list can only shrink.

use std::fs;
use std::path::{Path, PathBuf};

/// The repository root.
fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests/ has a parent")
        .to_path_buf()
}

/// Folders never scanned: build output, version control, the Python environment, run output.
const SKIP_DIRS: &[&str] = &[
    "target",
    ".git",
    ".venv",
    "ptacorr-demo",
    "out",
    "__pycache__",
];

/// Every file under `dir` (recursively), skipping [`SKIP_DIRS`].
fn walk(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(entries) = fs::read_dir(dir) else {
        return;
    };
    let mut entries: Vec<_> = entries.flatten().map(|e| e.path()).collect();
    entries.sort();
    for p in entries {
        let name = p.file_name().and_then(|n| n.to_str()).unwrap_or("");
        if p.is_dir() {
            if !SKIP_DIRS.contains(&name) {
                walk(&p, out);
            }
        } else {
            out.push(p);
        }
    }
}

/// The `.rs` files of a crate's `src/`, without the files of `#[cfg(test)] mod name;`
/// declarations, each with its non-test lines (1-based line number, text). An inline
/// `#[cfg(test)] mod ... {` block is taken to run to the end of its file (the convention here:
/// unit tests last), so everything after it is skipped.
fn non_test_sources(src: &Path) -> Vec<(PathBuf, Vec<(usize, String)>)> {
    let mut files = Vec::new();
    walk(src, &mut files);
    files.retain(|p| p.extension().is_some_and(|e| e == "rs"));
    let mut test_files: Vec<PathBuf> = Vec::new();
    let mut out = Vec::new();
    for p in &files {
        let text = fs::read_to_string(p).unwrap_or_default();
        let lines: Vec<&str> = text.lines().collect();
        let mut kept = Vec::new();
        let mut i = 0;
        while i < lines.len() {
            let t = lines[i].trim();
            if t == "#[cfg(test)]" {
                let next = lines.get(i + 1).map(|l| l.trim()).unwrap_or("");
                let decl = next
                    .strip_prefix("pub(crate) ")
                    .or_else(|| next.strip_prefix("pub "))
                    .unwrap_or(next);
                if let Some(name) = decl.strip_prefix("mod ") {
                    if let Some(name) = name.strip_suffix(';') {
                        // mod.rs and lib.rs declare siblings; foo.rs declares foo/name.rs.
                        let base = match p.file_name().and_then(|n| n.to_str()) {
                            Some("mod.rs") | Some("lib.rs") | Some("main.rs") => {
                                p.parent().unwrap().to_path_buf()
                            }
                            _ => p.with_extension(""),
                        };
                        test_files.push(base.join(format!("{name}.rs")));
                        test_files.push(base.join(name).join("mod.rs"));
                        i += 2;
                        continue;
                    }
                    break; // an inline test module: the rest of the file is tests
                }
            }
            kept.push((i + 1, lines[i].to_string()));
            i += 1;
        }
        out.push((p.clone(), kept));
    }
    out.retain(|(p, _)| !test_files.contains(p));
    out
}

/// Pre-existing violations being removed by issue 10: (rule, path from the repository root,
/// a substring of the offending line, why it is still here).
const KNOWN: &[(&str, &str, &str, &str)] = &[
    (
        "cli",
        "cli/src/main.rs",
        "let reduce_s = (pairs.0 - reduce.0).as_secs_f64();",
        "stage wall times from the engine's Stage callback, subtracted for printing",
    ),
    (
        "cli",
        "cli/src/main.rs",
        "let pairs_s = (done.0 - pairs.0).as_secs_f64();",
        "stage wall times from the engine's Stage callback, subtracted for printing",
    ),
    (
        "cli",
        "cli/src/main.rs",
        "c.reduction_flops() * 1e-9,",
        "the engine's flop count scaled to Gflop for printing",
    ),
    (
        "cli",
        "cli/src/common_cmd.rs",
        "t.elapsed().as_secs_f64()",
        "the fit's wall time for the progress line",
    ),
    (
        "cli",
        "cli/src/main.rs",
        "t.elapsed().as_secs_f64(), cpu_seconds() - cpu",
        "stage timings computed in the CLI (issue 10 point 4: the engine reports them)",
    ),
    (
        "cli",
        "cli/src/inject_cmd.rs",
        "t.elapsed().as_secs_f64()",
        "the campaign's wall time computed in the CLI (issue 10 point 4)",
    ),
    (
        "cli",
        "cli/src/main.rs",
        "t.tv_sec as f64 + t.tv_usec as f64 * 1e-6",
        "CPU seconds computed in the CLI (issue 10 point 4)",
    ),
    (
        "cli",
        "cli/src/main.rs",
        "c.grid.t_span / ptacorr::constants::SECONDS_PER_YEAR",
        "span in years computed in the CLI (issue 10 point 4)",
    ),
];

/// One finding: rule, file (relative), line number, text.
type Finding = (&'static str, String, usize, String);

/// Compare findings with [`KNOWN`]: fail on any finding not listed and on any listed entry that
/// no longer occurs.
fn judge(rule: &'static str, findings: Vec<Finding>, scanned: &[String]) {
    let known: Vec<_> = KNOWN.iter().filter(|k| k.0 == rule).collect();
    let mut unexpected = Vec::new();
    for (r, file, line, text) in &findings {
        let listed = known
            .iter()
            .any(|k| k.1 == file.as_str() && text.contains(k.2));
        if !listed {
            unexpected.push(format!("{file}:{line}: [{r}] {}", text.trim()));
        }
    }
    let mut stale = Vec::new();
    for k in &known {
        // An entry for a file that is gone (moved by a restructuring) is stale as well.
        let still = findings
            .iter()
            .any(|(_, file, _, text)| file.as_str() == k.1 && text.contains(k.2));
        if !still {
            let gone = if scanned.iter().any(|s| s == k.1) {
                ""
            } else {
                " (file not scanned any more)"
            };
            stale.push(format!("{}: \"{}\"{gone}", k.1, k.2));
        }
    }
    assert!(
        unexpected.is_empty() && stale.is_empty(),
        "rule `{rule}` of DEVELOPERS.md:\n  violations:\n    {}\n  fixed (remove them from KNOWN in tests/tests/rules.rs):\n    {}",
        unexpected.join("\n    "),
        stale.join("\n    ")
    );
}

fn relative(p: &Path) -> String {
    p.strip_prefix(repo())
        .unwrap_or(p)
        .to_string_lossy()
        .replace('\\', "/")
}

/// The `src/` folders of the workspace's crates other than the checks crate (`tests/`, whose
/// library is test code): every folder of the root holding a `Cargo.toml` and a `src/`, so a
/// crate added by a restructuring is scanned without editing this list.
fn crate_sources() -> Vec<PathBuf> {
    let mut dirs: Vec<PathBuf> = fs::read_dir(repo())
        .expect("repository root")
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.join("Cargo.toml").is_file() && p.join("src").is_dir())
        .filter(|p| p.file_name().is_some_and(|n| n != "tests"))
        .map(|p| p.join("src"))
        .collect();
    dirs.sort();
    dirs
}

/// Patterns of arithmetic a grep can see: calls of f64 maths, casts to f64, sums and products
/// of iterators (of any type: a total is a number too), durations turned into seconds (timings
/// belong to the engine), and `+ - * /` next to a float literal or a SCREAMING_CASE constant.
/// Integer arithmetic on counts and indices (`len() - 1`) is allowed; arithmetic between two
/// plain variables (`a - b`) needs types and is not caught.
const CLI_ARITHMETIC: &[&str] = &[
    ".sqrt(",
    ".powi(",
    ".powf(",
    ".ln(",
    ".log10(",
    ".log2(",
    ".exp(",
    ".abs(",
    ".mul_add(",
    ".hypot(",
    ".sin(",
    ".cos(",
    ".floor(",
    ".ceil(",
    ".round(",
    "as f64",
    ".sum(",
    ".sum::<",
    ".product(",
    ".as_secs_f64(",
    ".as_secs_f32(",
];

/// Is there `+ - * /` with a float literal or an upper-case constant as one operand?
fn literal_arithmetic(line: &str) -> bool {
    // Tokens: numbers (with an exponent sign), paths (`a::B_C`, `x.y`), single punctuation.
    let c: Vec<char> = line.chars().collect();
    let mut tokens: Vec<String> = Vec::new();
    let mut i = 0;
    while i < c.len() {
        let start = i;
        if c[i].is_ascii_digit() {
            while i < c.len()
                && (c[i].is_alphanumeric()
                    || c[i] == '_'
                    || (c[i] == '.' && c.get(i + 1).is_some_and(|d| d.is_ascii_digit()))
                    || (matches!(c[i], '+' | '-') && matches!(c[i - 1], 'e' | 'E')))
            {
                i += 1;
            }
        } else if c[i].is_alphabetic() || c[i] == '_' {
            while i < c.len() && (c[i].is_alphanumeric() || matches!(c[i], '_' | ':' | '.')) {
                i += 1;
            }
        } else {
            i += 1;
            if c[start].is_whitespace() {
                continue;
            }
        }
        tokens.push(c[start..i].iter().collect());
    }
    let is_float = |s: &str| {
        s.starts_with(|c: char| c.is_ascii_digit())
            && (s.contains('.') || s.contains(['e', 'E']))
            && s.trim_end_matches("f64").parse::<f64>().is_ok()
    };
    let is_constant = |s: &str| {
        let last = s.rsplit("::").next().unwrap_or("");
        last.len() >= 3
            && last
                .chars()
                .all(|c| c.is_ascii_uppercase() || c == '_' || c.is_ascii_digit())
            && last.chars().any(|c| c.is_ascii_uppercase())
    };
    let operand = |s: Option<&String>| s.is_some_and(|s| is_float(s) || is_constant(s));
    for (k, t) in tokens.iter().enumerate() {
        if !matches!(t.as_str(), "+" | "-" | "*" | "/") {
            continue;
        }
        let next = tokens.get(k + 1);
        if t == "-" && next.is_some_and(|n| n == ">") {
            continue; // ->
        }
        let prev = k.checked_sub(1).map(|p| &tokens[p]);
        // A unary minus or a dereference has no operand on its left.
        let unary = prev.is_none_or(|p| {
            [
                "(", ",", "=", "[", "{", "<", ">", "!", "&", "|", ":", ";", "return",
            ]
            .contains(&p.as_str())
        });
        if unary && matches!(t.as_str(), "-" | "*") {
            continue;
        }
        // Compound assignment: the operand follows the `=`.
        let right = if next.is_some_and(|n| n == "=") {
            tokens.get(k + 2)
        } else {
            next
        };
        if operand(prev) || operand(right) {
            return true;
        }
    }
    false
}

/// The code part of a line: text before a `//` comment, with string literals blanked (so a
/// message such as "1/(N+1)" is not arithmetic).
fn code_of(line: &str) -> String {
    let mut out = String::new();
    let mut in_str = false;
    let mut prev = ' ';
    let chars: Vec<char> = line.chars().collect();
    for (i, &c) in chars.iter().enumerate() {
        if !in_str && c == '/' && chars.get(i + 1) == Some(&'/') {
            break;
        }
        if c == '"' && prev != '\\' {
            in_str = !in_str;
            out.push('"');
        } else if in_str {
            out.push(' ');
        } else {
            out.push(c);
        }
        prev = c;
    }
    out
}

/// Every non-test line of the `.rs` files under `dirs` on which `hit` sees a violation of
/// `rule` (given the line's code, [`code_of`]), and the files scanned (relative paths).
fn scan(
    rule: &'static str,
    dirs: &[PathBuf],
    hit: impl Fn(&str) -> bool,
) -> (Vec<Finding>, Vec<String>) {
    let mut findings = Vec::new();
    let mut scanned = Vec::new();
    for dir in dirs {
        let sources = non_test_sources(dir);
        assert!(!sources.is_empty(), "no sources found in {}", dir.display());
        for (p, lines) in sources {
            let rel = relative(&p);
            for (n, line) in lines {
                if hit(&code_of(&line)) {
                    findings.push((rule, rel.clone(), n, line));
                }
            }
            scanned.push(rel);
        }
    }
    (findings, scanned)
}

/// Is this code a doc comment?
fn is_doc(code: &str) -> bool {
    let t = code.trim_start();
    t.starts_with("///") || t.starts_with("//!")
}

#[test]
fn the_cli_computes_no_numbers() {
    let (findings, scanned) = scan("cli", &[repo().join("cli/src")], |code| {
        !is_doc(code)
            && (CLI_ARITHMETIC.iter().any(|pat| code.contains(pat)) || literal_arithmetic(code))
    });
    judge("cli", findings, &scanned);
}

/// The CLI never panics (DEVELOPERS.md): `println!` and `eprintln!` panic when their stream is
/// closed (`ptacorr null ... | head`), so the CLI prints only through `outln!` and `errln!`
/// (cli/src/print.rs). cli/tests/cli.rs runs the binary into a closed pipe.
#[test]
fn the_cli_prints_only_through_its_panic_free_printer() {
    let panicking = ["println!(", "eprintln!(", "print!(", "eprint!(", "dbg!("];
    let (findings, scanned) = scan("print", &[repo().join("cli/src")], |code| {
        !is_doc(code)
            && panicking.iter().any(|m| {
                code.match_indices(m).any(|(i, _)| {
                    // `eprintln!(` contains `println!(`: a match counts only as a whole name.
                    !code[..i].ends_with(|c: char| c.is_alphanumeric() || c == '_')
                })
            })
    });
    judge("print", findings, &scanned);
}

#[test]
fn the_cli_rule_sees_what_it_claims_to() {
    // The grep rule itself: it must flag these and pass over those.
    for bad in [
        "let y = x * 1e-9;",
        "let s = t / SECONDS_PER_YEAR;",
        "let s = t / ptacorr::constants::SECONDS_PER_YEAR;",
        "    2.0 + a",
        "let r = v.iter().sum::<f64>();",
        "let a = a2.sqrt();",
        "let f = n as f64;",
        "x += 0.5;",
    ] {
        let code = code_of(bad);
        assert!(
            CLI_ARITHMETIC.iter().any(|p| code.contains(p)) || literal_arithmetic(&code),
            "not flagged: {bad}"
        );
    }
    for good in [
        "println!(\"{:.3e} 1/(N+1) = {}\", a, b);",
        "fn run() -> Result<()> {",
        "let n = dirs.len() - 1;",
        "// a comment with 2.0 * x",
        "#[arg(long, default_value_t = 14)]",
        "f(-1.0, *n, x)",
        "fn g(x: f64) -> f64 {",
    ] {
        let code = code_of(good);
        assert!(
            !(CLI_ARITHMETIC.iter().any(|p| code.contains(p)) || literal_arithmetic(&code)),
            "flagged: {good}"
        );
    }
}

#[test]
fn every_file_write_goes_through_the_atomic_writer() {
    const WRITES: &[&str] = &["fs::write(", "File::create(", "OpenOptions", "fs::copy("];
    let allowed = "engine/src/output.rs";
    let dirs = crate_sources();
    assert!(
        dirs.iter().any(|d| d.ends_with("engine/src")),
        "engine/src not found among {dirs:?}"
    );
    let (mut findings, scanned) = scan("writer", &dirs, |code| {
        WRITES.iter().any(|w| code.contains(w))
    });
    findings.retain(|f| f.1 != allowed);
    assert!(scanned.iter().any(|s| s == allowed), "{allowed} not found");
    judge("writer", findings, &scanned);
}

/// Issue 10.7: an unused constant is removed, not silenced with `let _ = (A, B);`. A binding of
/// a tuple to `_` in product code only ever serves that purpose.
#[test]
fn no_constants_are_silenced_with_a_tuple_binding() {
    let dirs = crate_sources();
    assert!(
        dirs.iter().any(|d| d.ends_with("engine/src")),
        "engine/src not found among {dirs:?}"
    );
    let (findings, scanned) = scan("silenced", &dirs, |code| {
        code.replace(' ', "").starts_with("let_=(")
    });
    judge("silenced", findings, &scanned);
}

/// What no file may mention: the outside document the code once cited, and the folder it was
/// in. Built from pieces so that this file does not match itself.
const FORBIDDEN_MENTIONS: &[&[&str]] = &[
    &["science", " notes"],
    &["../", "shared"],
    &["/work/", "shared"],
];

#[test]
fn no_file_cites_a_document_outside_the_project() {
    let mut files = Vec::new();
    walk(&repo(), &mut files);
    let needles: Vec<String> = FORBIDDEN_MENTIONS.iter().map(|p| p.concat()).collect();
    let mut hits = Vec::new();
    let mut n_text = 0;
    for p in &files {
        let Ok(text) = fs::read_to_string(p) else {
            continue; // binary (figures, fonts)
        };
        n_text += 1;
        let lower = text.to_lowercase();
        for (i, line) in lower.lines().enumerate() {
            for needle in &needles {
                if line.contains(needle.as_str()) {
                    hits.push(format!("{}:{}: {needle}", relative(p), i + 1));
                }
            }
        }
    }
    // The walk found the project (README, docs, sources), not an empty folder.
    assert!(
        n_text > 50,
        "only {n_text} text files found under {}",
        repo().display()
    );
    assert!(
        hits.is_empty(),
        "the project must stand alone; point these at a page in docs/ instead:\n  {}",
        hits.join("\n  ")
    );
}
