//! The `Dockerfile` read as text, since no container engine runs here: its build stage must put every file the
//! compiler reads (the manifest and lock file, the target roots, every `.rs` under `src/` and every file they
//! `include_str!`/`include_bytes!`) where `cargo build` looks for it; the build is `--locked`; the image runs as
//! a non-root user with a HEALTHCHECK; and every path it copies from the context exists and is not left out of
//! the context by `.dockerignore`.
//!
//! The reading of the Dockerfile is deliberately small: instructions with `\` continuations and comment lines,
//! stages split at FROM, WORKDIR, and COPY/ADD in shell or JSON form with `--flag` options. A COPY source with a
//! wildcard is refused rather than guessed at.

use std::collections::BTreeSet;
use std::path::{Component, Path, PathBuf};

const ROOT: &str = env!("CARGO_MANIFEST_DIR");

fn repo(p: impl AsRef<Path>) -> PathBuf {
    Path::new(ROOT).join(p)
}

/// `p` with `.` and `..` folded away (lexically; nothing here is a symlink).
fn normalize(p: &Path) -> PathBuf {
    let mut out = PathBuf::new();
    for c in p.components() {
        match c {
            Component::CurDir => {}
            Component::ParentDir => {
                if !out.pop() {
                    out.push("..");
                }
            }
            other => out.push(other),
        }
    }
    out
}

struct Instr {
    keyword: String,
    args: String,
    line: usize,
}

/// The Dockerfile's instructions: continuation lines joined, comment and blank lines dropped.
fn instructions(text: &str) -> Vec<Instr> {
    let mut out = Vec::new();
    let mut pending: Option<(usize, String)> = None;
    for (i, raw) in text.lines().enumerate() {
        let t = raw.trim();
        if t.starts_with('#') || (t.is_empty() && pending.is_none()) {
            continue;
        }
        let (body, continues) = match t.strip_suffix('\\') {
            Some(b) => (b.trim_end(), true),
            None => (t, false),
        };
        let (start, mut acc) = pending.take().unwrap_or((i + 1, String::new()));
        if !acc.is_empty() {
            acc.push(' ');
        }
        acc.push_str(body);
        if continues {
            pending = Some((start, acc));
        } else if !acc.trim().is_empty() {
            let (kw, rest) = acc.trim().split_once(char::is_whitespace).unwrap_or((acc.trim(), ""));
            out.push(Instr { keyword: kw.to_ascii_uppercase(), args: rest.trim().to_string(), line: start });
        }
    }
    assert!(pending.is_none(), "the Dockerfile ends inside a `\\` continuation");
    out
}

struct Stage {
    name: Option<String>,
    instrs: Vec<Instr>,
}

fn stages(instrs: Vec<Instr>) -> Vec<Stage> {
    let mut out: Vec<Stage> = Vec::new();
    for ins in instrs {
        if ins.keyword == "FROM" {
            let words: Vec<&str> = ins.args.split_whitespace().collect();
            let name = words.iter().position(|w| w.eq_ignore_ascii_case("as")).and_then(|i| words.get(i + 1));
            out.push(Stage { name: name.map(|s| s.to_string()), instrs: vec![ins] });
        } else {
            out.last_mut().expect("an instruction before the first FROM").instrs.push(ins);
        }
    }
    out
}

/// One COPY or ADD, with its destination made absolute against the stage's WORKDIR at that point.
struct Copy {
    line: usize,
    from: Option<String>,
    sources: Vec<String>,
    dest: String,
}

fn parse_copy(ins: &Instr, workdir: &Path) -> Copy {
    let mut rest = ins.args.as_str();
    let mut from = None;
    while let Some(r) = rest.strip_prefix("--") {
        let (flag, after) = r.split_once(char::is_whitespace).unwrap_or((r, ""));
        if let Some(v) = flag.strip_prefix("from=") {
            from = Some(v.to_string());
        }
        rest = after.trim_start();
    }
    let mut words: Vec<String> = if rest.starts_with('[') {
        serde_json::from_str(rest).unwrap_or_else(|e| panic!("Dockerfile line {}: bad JSON form: {e}", ins.line))
    } else {
        rest.split_whitespace().map(str::to_string).collect()
    };
    assert!(words.len() >= 2, "Dockerfile line {}: {} needs a source and a destination", ins.line, ins.keyword);
    let dest_word = words.pop().unwrap();
    let dest = if dest_word.starts_with('/') { PathBuf::from(&dest_word) } else { workdir.join(&dest_word) };
    let mut dest = normalize(&dest).to_string_lossy().into_owned();
    // A trailing slash, or several sources, makes the destination a directory.
    if dest_word.ends_with('/') || words.len() > 1 {
        dest.push('/');
    }
    Copy { line: ins.line, from, sources: words, dest }
}

/// The stage's COPY/ADD instructions up to (not including) the first instruction for which `stop` holds, and
/// the WORKDIR in force there.
fn copies_until(stage: &Stage, stop: impl Fn(&Instr) -> bool) -> (Vec<Copy>, PathBuf) {
    let mut workdir = PathBuf::from("/");
    let mut copies = Vec::new();
    for ins in &stage.instrs {
        if stop(ins) {
            break;
        }
        match ins.keyword.as_str() {
            "WORKDIR" => workdir = normalize(&workdir.join(ins.args.trim())),
            "COPY" | "ADD" => copies.push(parse_copy(ins, &workdir)),
            _ => {}
        }
    }
    (copies, workdir)
}

/// The literal (wildcard-free) patterns of `.dockerignore`, which leave paths out of the build context.
fn dockerignore() -> Vec<PathBuf> {
    let text = std::fs::read_to_string(repo(".dockerignore")).unwrap_or_default();
    text.lines()
        .map(str::trim)
        .filter(|l| !l.is_empty() && !l.starts_with('#') && !l.starts_with('!'))
        .filter(|l| !l.contains(['*', '?', '[']))
        .map(|l| normalize(Path::new(l.trim_matches('/'))))
        .collect()
}

/// Where the context file `file` (repository-relative) lands in the image through `copy`, if it does.
fn lands_at(copy: &Copy, file: &Path) -> Option<PathBuf> {
    if copy.from.is_some() {
        return None;
    }
    for s in &copy.sources {
        assert!(
            !s.contains(['*', '?', '[']),
            "Dockerfile line {}: wildcard source {s:?} not understood here",
            copy.line
        );
        let src = normalize(Path::new(s.trim_start_matches('/')));
        if repo(&src).is_dir() {
            if let Ok(under) = file.strip_prefix(&src) {
                return Some(Path::new(copy.dest.trim_end_matches('/')).join(under));
            }
        } else if file == src {
            return Some(if copy.dest.ends_with('/') {
                Path::new(&copy.dest).join(src.file_name().unwrap())
            } else {
                PathBuf::from(&copy.dest)
            });
        }
    }
    None
}

fn rs_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for entry in std::fs::read_dir(dir).unwrap() {
        let p = entry.unwrap().path();
        if p.is_dir() {
            rs_files(&p, out);
        } else if p.extension().is_some_and(|e| e == "rs") {
            out.push(p);
        }
    }
}

/// The files that `file` (repository-relative) includes with `include_str!`/`include_bytes!`, resolved against
/// its directory to repository-relative paths. An argument that is not a plain string literal fails the test:
/// it cannot be checked here, so whoever writes it decides how the Dockerfile gets the file.
fn includes_of(file: &Path) -> Vec<PathBuf> {
    let text = std::fs::read_to_string(repo(file)).unwrap();
    let mut out = Vec::new();
    for (n, line) in text.lines().enumerate() {
        for mac in ["include_str!", "include_bytes!"] {
            let mut from = 0;
            while let Some(at) = line[from..].find(mac).map(|i| i + from) {
                from = at + mac.len();
                if line[..at].contains("//") {
                    break; // a comment that names the macro
                }
                let arg = line[from..].trim_start().strip_prefix('(').map(str::trim_start);
                let lit = arg.and_then(|a| a.strip_prefix('"')).and_then(|a| a.split_once('"')).map(|(l, _)| l);
                let Some(lit) = lit.filter(|l| !l.contains('\\')) else {
                    panic!("{}:{}: {mac} with an argument other than a plain string literal", file.display(), n + 1)
                };
                assert!(!Path::new(lit).is_absolute(), "{}:{}: {mac} of an absolute path", file.display(), n + 1);
                let target = normalize(&file.parent().unwrap().join(lit));
                assert!(
                    !target.starts_with(".."),
                    "{}:{}: {mac}({lit:?}) reaches outside the repository, so outside the build context",
                    file.display(),
                    n + 1
                );
                assert!(repo(&target).is_file(), "{}:{}: {mac}({lit:?}): no such file", file.display(), n + 1);
                out.push(target);
            }
        }
    }
    out
}

/// The target root files that Cargo.toml declares ([lib], [[bin]], [[bench]], [[test]], [[example]]): cargo
/// wants each of them present to load the manifest at all, whatever target it builds.
fn manifest_targets() -> Vec<PathBuf> {
    let text = std::fs::read_to_string(repo("Cargo.toml")).unwrap();
    let mut out = Vec::new();
    let mut section = String::new();
    let mut name: Option<String> = None;
    let mut path: Option<String> = None;
    let flush = |section: &str, name: &mut Option<String>, path: &mut Option<String>, out: &mut Vec<PathBuf>| {
        let default = match (section, name.as_deref()) {
            ("lib", _) => Some("src/lib.rs".to_string()),
            ("bin", Some(env!("CARGO_PKG_NAME"))) => Some("src/main.rs".to_string()),
            ("bin", Some(n)) => Some(format!("src/bin/{n}.rs")),
            ("bench", Some(n)) => Some(format!("benches/{n}.rs")),
            ("test", Some(n)) => Some(format!("tests/{n}.rs")),
            ("example", Some(n)) => Some(format!("examples/{n}.rs")),
            _ => None,
        };
        if let Some(p) = path.take().or(default) {
            out.push(normalize(Path::new(&p)));
        }
        *name = None;
    };
    for line in text.lines().map(str::trim) {
        if line.starts_with('[') {
            flush(&section, &mut name, &mut path, &mut out);
            section = line.trim_matches(['[', ']']).trim().to_string();
            continue;
        }
        let Some((k, v)) = line.split_once('=') else { continue };
        let v = v.trim().trim_matches('"').to_string();
        match k.trim() {
            "name" => name = Some(v),
            "path" => path = Some(v),
            _ => {}
        }
    }
    flush(&section, &mut name, &mut path, &mut out);
    out
}

fn dockerfile() -> Vec<Stage> {
    let text = std::fs::read_to_string(repo("Dockerfile")).expect("a Dockerfile at the repository root");
    stages(instructions(&text))
}

fn is_cargo_build(ins: &Instr) -> bool {
    ins.keyword == "RUN" && (ins.args.contains("cargo build") || ins.args.contains("cargo install"))
}

#[test]
fn the_build_stage_copies_every_file_the_compiler_reads() {
    let stages = dockerfile();
    let build = stages.iter().find(|s| s.instrs.iter().any(is_cargo_build)).expect("a stage that runs cargo build");
    let (copies, workdir) = copies_until(build, is_cargo_build);

    let mut needed: BTreeSet<PathBuf> = ["Cargo.toml", "Cargo.lock"].iter().map(PathBuf::from).collect();
    for optional in ["build.rs", ".cargo/config.toml", "rust-toolchain.toml", "rust-toolchain"] {
        if repo(optional).exists() {
            needed.insert(optional.into());
        }
    }
    needed.extend(manifest_targets());
    let mut sources = Vec::new();
    rs_files(&repo("src"), &mut sources);
    let mut included = 0;
    for abs in sources {
        let rel = abs.strip_prefix(ROOT).unwrap().to_path_buf();
        let inc = includes_of(&rel);
        included += inc.len();
        needed.extend(inc);
        needed.insert(rel);
    }
    assert!(included > 0, "no include_str!/include_bytes! found under src/: the scan is broken");

    let ignored = dockerignore();
    let mut missing = Vec::new();
    for file in &needed {
        // Cargo resolves everything against the directory it runs in, and an include against the including
        // file's directory: with the sources at the same relative places, both come to WORKDIR/<path>.
        let want = workdir.join(file);
        let in_context = !ignored.iter().any(|i| file.starts_with(i));
        if !in_context || !copies.iter().any(|c| lands_at(c, file).as_deref() == Some(want.as_path())) {
            missing.push(format!(
                "{} (wanted at {}{})",
                file.display(),
                want.display(),
                if in_context { "" } else { "; left out of the context by .dockerignore" }
            ));
        }
    }
    assert!(
        missing.is_empty(),
        "the Dockerfile's build stage (WORKDIR {}) does not copy what the build reads:\n  {}",
        workdir.display(),
        missing.join("\n  ")
    );
}

#[test]
fn the_build_is_locked() {
    let stages = dockerfile();
    let builds: Vec<&Instr> = stages.iter().flat_map(|s| &s.instrs).filter(|i| is_cargo_build(i)).collect();
    assert!(!builds.is_empty(), "no RUN cargo build in the Dockerfile");
    for b in builds {
        assert!(b.args.contains("--locked"), "Dockerfile line {}: cargo without --locked: {}", b.line, b.args);
    }
}

#[test]
fn the_image_runs_as_a_non_root_user_with_a_healthcheck() {
    let stages = dockerfile();
    let last = stages.last().expect("a FROM");
    let user = last.instrs.iter().rev().find(|i| i.keyword == "USER").expect("a USER in the final stage");
    let name = user.args.split(':').next().unwrap().trim();
    assert!(!name.is_empty() && name != "root" && name != "0", "Dockerfile line {}: USER {}", user.line, user.args);

    let hc = last.instrs.iter().rev().find(|i| i.keyword == "HEALTHCHECK").expect("a HEALTHCHECK in the final stage");
    assert!(!hc.args.trim().eq_ignore_ascii_case("none"), "Dockerfile line {}: HEALTHCHECK NONE", hc.line);
    let cmd = hc.args.split_once("CMD").map(|(_, c)| c.trim()).expect("HEALTHCHECK ... CMD <command>");
    // The program it runs must be in the final image: installed or copied by that stage.
    let program = cmd.trim_start_matches(['[', '"']).split(['"', ' ']).next().unwrap();
    let program = program.rsplit('/').next().unwrap();
    let provided = last.instrs.iter().any(|i| matches!(i.keyword.as_str(), "RUN" | "COPY") && i.args.contains(program));
    assert!(
        provided,
        "Dockerfile line {}: HEALTHCHECK runs {program}, which the final stage does not provide",
        hc.line
    );
}

#[test]
fn every_path_copied_from_the_context_exists() {
    let stages = dockerfile();
    let ignored = dockerignore();
    let names: Vec<&str> = stages.iter().filter_map(|s| s.name.as_deref()).collect();
    for stage in &stages {
        let (copies, _) = copies_until(stage, |_| false);
        for c in copies {
            if let Some(from) = &c.from {
                assert!(names.contains(&from.as_str()), "Dockerfile line {}: --from={from}: no such stage", c.line);
                continue;
            }
            for s in &c.sources {
                assert!(!s.contains("://"), "Dockerfile line {}: remote source {s}", c.line);
                let p = normalize(Path::new(s.trim_start_matches('/')));
                assert!(!p.starts_with(".."), "Dockerfile line {}: {s} is outside the build context", c.line);
                assert!(repo(&p).exists(), "Dockerfile line {}: {s} does not exist in the repository", c.line);
                assert!(
                    !ignored.iter().any(|i| p.starts_with(i)),
                    "Dockerfile line {}: {s} is left out of the context by .dockerignore",
                    c.line
                );
            }
        }
    }
}
