//! Checks of the deployment files under `deploy/`: they must parse, agree with each
//! other, and use only the command-line interface the two binaries offer.
//!
//! External references for the checks:
//! - `systemd-analyze verify` and `systemd-analyze security --offline` from Debian's
//!   `systemd` package judge the unit files (systemd's own parser, not ours).
//! - `shellcheck` from Debian's `shellcheck` package judges the Slurm script.
//! - The official Kubernetes Python client (PyPI `kubernetes`), whose models are
//!   generated from the Kubernetes OpenAPI spec, judges field names and types
//!   (tests/reference/check_k8s_fields.py).
//! - The Kubernetes field rules checked here (apiVersion/kind pairs, selector ⊆ pod
//!   labels, annotation values are strings, probes, `secretKeyRef`, HPA
//!   `scaleTargetRef`) follow the Kubernetes API reference; the apiVersions are the
//!   stable ones as of Kubernetes 1.23+, from memory.
//! - The command-line contract (`CONTRACT` below) is the interface agreed for
//!   `tessera-server serve` and `tessera-worker run`; the launch test
//!   (`deployed_command_lines_start_a_real_server_and_worker`) runs the real binaries
//!   with the invocations extracted here.
//!
//! Every check collects messages naming the file and field at fault; the
//! `*_rejects_*` tests break a copy on purpose to show each check can fail.

use serde_norway::Value;
use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::process::Command;

// ---------------------------------------------------------------------------
// The command-line contract of the binaries.
// ---------------------------------------------------------------------------

/// What one binary accepts: a subcommand, its flags (each takes a value), and the
/// environment variables it reads. `required` pairs a flag with its env equivalent:
/// a deployment must give one of the two.
struct Cli {
    program: &'static str,
    subcommand: &'static str,
    flags: &'static [&'static str],
    env: &'static [&'static str],
    required: &'static [(&'static str, &'static str)],
}

const CONTRACT: [Cli; 2] = [
    Cli {
        program: "tessera-server",
        subcommand: "serve",
        flags: &["--listen", "--db"],
        env: &[
            "TESSERA_LISTEN",
            "TESSERA_DB",
            "TESSERA_LEASE_SECONDS",
            "RUST_LOG",
        ],
        required: &[("--listen", "TESSERA_LISTEN"), ("--db", "TESSERA_DB")],
    },
    Cli {
        program: "tessera-worker",
        subcommand: "run",
        flags: &["--server", "--token", "--threads"],
        env: &[
            "TESSERA_SERVER",
            "TESSERA_TOKEN",
            "TESSERA_THREADS",
            "RUST_LOG",
        ],
        required: &[("--server", "TESSERA_SERVER"), ("--token", "TESSERA_TOKEN")],
    },
];

fn cli_of(program: &str) -> Option<&'static Cli> {
    CONTRACT.iter().find(|c| c.program == program)
}

fn all_contract_env() -> BTreeSet<&'static str> {
    CONTRACT
        .iter()
        .flat_map(|c| c.env.iter().copied())
        .collect()
}

/// Debian packages of the outside tools these checks run (also in deploy/ci-packages.txt).
const TOOLS: [(&str, &str); 2] = [("systemd-analyze", "systemd"), ("shellcheck", "shellcheck")];

// ---------------------------------------------------------------------------
// Small helpers.
// ---------------------------------------------------------------------------

fn repo_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests/ has a parent")
        .to_path_buf()
}

fn deploy(rel: &str) -> PathBuf {
    repo_root().join("deploy").join(rel)
}

fn read(rel: &str) -> String {
    let p = deploy(rel);
    std::fs::read_to_string(&p).unwrap_or_else(|e| panic!("cannot read {}: {e}", p.display()))
}

/// Files in `deploy/<dir>` whose names end with `suffix`, sorted.
fn files_in(dir: &str, suffix: &str) -> Vec<PathBuf> {
    let d = deploy(dir);
    let mut out: Vec<PathBuf> = std::fs::read_dir(&d)
        .unwrap_or_else(|e| panic!("cannot list {}: {e}", d.display()))
        .map(|e| e.expect("directory entry").path())
        .filter(|p| {
            p.file_name()
                .and_then(|n| n.to_str())
                .is_some_and(|n| n.ends_with(suffix))
        })
        .collect();
    out.sort();
    out
}

fn rel_name(p: &Path) -> String {
    p.strip_prefix(repo_root())
        .unwrap_or(p)
        .display()
        .to_string()
}

fn basename(s: &str) -> &str {
    s.rsplit('/').next().unwrap_or(s)
}

/// Fails the test, with the install command, when an outside tool is missing:
/// these checks must never pass by being skipped.
fn require_tool(tool: &str) {
    let package = TOOLS
        .iter()
        .find(|(t, _)| *t == tool)
        .map(|(_, p)| *p)
        .unwrap_or(tool);
    let found = Command::new(tool).arg("--version").output();
    if found.is_err() {
        panic!(
            "`{tool}` is not installed; the deployment checks need it. Install it with \
             `apt-get install -y {package}` (deploy/ci-packages.txt lists every package they need)"
        );
    }
}

fn assert_no_errors(what: &str, errors: &[String]) {
    assert!(
        errors.is_empty(),
        "{what}: {} problem(s):\n  {}",
        errors.len(),
        errors.join("\n  ")
    );
}

fn assert_has_error(errors: &[String], needle: &str) {
    assert!(
        errors.iter().any(|e| e.contains(needle)),
        "expected an error containing {needle:?}, got: {errors:#?}"
    );
}

/// Splits a command line into words: blanks separate, '…' and "…" group (quotes removed).
fn split_words(line: &str) -> Vec<String> {
    let mut words = Vec::new();
    let mut cur = String::new();
    let mut in_word = false;
    let mut quote: Option<char> = None;
    for ch in line.chars() {
        match quote {
            Some(q) if ch == q => quote = None,
            Some(_) => cur.push(ch),
            None if ch == '"' || ch == '\'' => {
                quote = Some(ch);
                in_word = true;
            }
            None if ch.is_whitespace() => {
                if in_word {
                    words.push(std::mem::take(&mut cur));
                    in_word = false;
                }
            }
            None => {
                cur.push(ch);
                in_word = true;
            }
        }
    }
    if in_word {
        words.push(cur);
    }
    words
}

/// Port of `HOST:PORT` or of a URL `scheme://HOST:PORT/...`.
fn port_of(addr: &str) -> Option<u16> {
    let rest = addr.split("://").nth(1).unwrap_or(addr);
    let hostport = rest.split('/').next()?;
    hostport.rsplit_once(':')?.1.parse().ok()
}

fn host_of_url(url: &str) -> Option<&str> {
    let rest = url.split("://").nth(1)?;
    let hostport = rest.split('/').next()?;
    Some(
        hostport
            .rsplit_once(':')
            .map(|(h, _)| h)
            .unwrap_or(hostport),
    )
}

/// Seconds of a systemd time span such as `300`, `300s`, `5min`, `1h`.
fn systemd_seconds(v: &str) -> Option<u64> {
    let v = v.trim();
    let split = v.find(|c: char| !c.is_ascii_digit()).unwrap_or(v.len());
    let (num, unit) = v.split_at(split);
    let n: u64 = num.parse().ok()?;
    let mult = match unit.trim() {
        "" | "s" | "sec" => 1,
        "min" | "m" => 60,
        "h" | "hr" => 3600,
        _ => return None,
    };
    Some(n * mult)
}

// ---------------------------------------------------------------------------
// Invocations: how each deployment file starts a binary, normalized.
// ---------------------------------------------------------------------------

/// One way a deployment file starts a binary.
#[derive(Debug, Clone)]
struct Invocation {
    /// The file (and object) it comes from.
    source: String,
    /// Basename of the program, e.g. `tessera-worker`.
    program: String,
    /// Words after the program, e.g. `["serve", "--listen", "${TESSERA_LISTEN}", ...]`.
    args: Vec<String>,
    /// Environment the file gives the program: name and literal value where it has one.
    env: Vec<(String, Option<String>)>,
}

impl Invocation {
    /// The flags used, without their values (`--x=v` counts as `--x`).
    fn flags(&self) -> Vec<String> {
        self.args
            .iter()
            .filter(|a| a.starts_with('-'))
            .map(|a| a.split('=').next().unwrap_or(a).to_string())
            .collect()
    }

    /// The normalized list: subcommand, then flags, then environment names.
    fn normalized(&self) -> Vec<String> {
        let mut out: Vec<String> = self.args.first().into_iter().cloned().collect();
        out.extend(self.flags());
        out.extend(self.env.iter().map(|(n, _)| n.clone()));
        out
    }

    fn env_value(&self, name: &str) -> Option<&str> {
        self.env
            .iter()
            .find(|(n, _)| n == name)
            .and_then(|(_, v)| v.as_deref())
    }

    /// Value of a flag (`--x v` or `--x=v`).
    fn flag_value(&self, flag: &str) -> Option<&str> {
        let mut it = self.args.iter();
        while let Some(a) = it.next() {
            if a == flag {
                return it.next().map(String::as_str);
            }
            if let Some(v) = a.strip_prefix(flag).and_then(|r| r.strip_prefix('=')) {
                return Some(v);
            }
        }
        None
    }
}

/// Checks one invocation against the contract; returns the problems found.
fn check_invocation(inv: &Invocation) -> Vec<String> {
    let mut errors = Vec::new();
    let at = &inv.source;
    let Some(cli) = cli_of(&inv.program) else {
        return vec![format!("{at}: starts unknown program '{}'", inv.program)];
    };
    match inv.args.first() {
        Some(s) if s == cli.subcommand => {}
        other => errors.push(format!(
            "{at}: {} must be started as `{} {}`, found subcommand {:?}",
            cli.program, cli.program, cli.subcommand, other
        )),
    }
    let args = &inv.args[inv.args.len().min(1)..];
    let mut i = 0;
    while i < args.len() {
        let a = &args[i];
        if !a.starts_with('-') {
            errors.push(format!(
                "{at}: stray argument '{a}' (every flag of {} takes one value)",
                cli.program
            ));
            i += 1;
            continue;
        }
        let (flag, inline_value) = match a.split_once('=') {
            Some((f, v)) => (f, Some(v)),
            None => (a.as_str(), None),
        };
        if !cli.flags.contains(&flag) {
            errors.push(format!(
                "{at}: {} has no flag '{flag}' (known: {})",
                cli.program,
                cli.flags.join(" ")
            ));
        }
        if flag == "--token" {
            errors.push(format!(
                "{at}: the token is on the command line, which `ps` shows to every user; use TESSERA_TOKEN"
            ));
        }
        if inline_value.is_none() {
            match args.get(i + 1) {
                Some(v) if !v.starts_with('-') => i += 1,
                _ => errors.push(format!("{at}: flag '{flag}' has no value")),
            }
        }
        i += 1;
    }
    let mut seen = BTreeSet::new();
    for (name, _) in &inv.env {
        if !cli.env.contains(&name.as_str()) {
            errors.push(format!(
                "{at}: {} reads no environment variable '{name}' (known: {})",
                cli.program,
                cli.env.join(" ")
            ));
        }
        if !seen.insert(name) {
            errors.push(format!("{at}: environment variable '{name}' is set twice"));
        }
    }
    let flags = inv.flags();
    for (flag, env) in cli.required {
        if !flags.iter().any(|f| f == flag) && !inv.env.iter().any(|(n, _)| n == env) {
            errors.push(format!(
                "{at}: {} gets neither {flag} nor {env}",
                cli.program
            ));
        }
    }
    errors
}

// --- systemd units ----------------------------------------------------------

/// A unit file as (section, key, value) entries in file order.
struct Unit {
    entries: Vec<(String, String, String)>,
}

impl Unit {
    fn parse(text: &str) -> Unit {
        let mut entries = Vec::new();
        let mut section = String::new();
        let mut pending = String::new();
        for raw in text.lines() {
            let line = raw.trim();
            if pending.is_empty()
                && (line.is_empty() || line.starts_with('#') || line.starts_with(';'))
            {
                continue;
            }
            if let Some(cont) = line.strip_suffix('\\') {
                pending.push_str(cont);
                pending.push(' ');
                continue;
            }
            let full = format!("{pending}{line}");
            pending.clear();
            if full.starts_with('[') && full.ends_with(']') {
                section = full[1..full.len() - 1].to_string();
            } else if let Some((k, v)) = full.split_once('=') {
                entries.push((section.clone(), k.trim().to_string(), v.trim().to_string()));
            }
        }
        Unit { entries }
    }

    fn values(&self, section: &str, key: &str) -> Vec<&str> {
        self.entries
            .iter()
            .filter(|(s, k, _)| s == section && k == key)
            .map(|(_, _, v)| v.as_str())
            .collect()
    }

    fn last(&self, section: &str, key: &str) -> Option<&str> {
        self.values(section, key).last().copied()
    }
}

/// Environment names in an env file (`NAME=value`; a commented-out `#NAME=value`
/// counts too, since operators uncomment it).
fn env_file_entries(text: &str) -> Vec<(String, String)> {
    text.lines()
        .filter_map(|l| {
            let l = l.trim();
            let l = l.strip_prefix('#').unwrap_or(l);
            let (k, v) = l.split_once('=')?;
            let is_name = !k.is_empty()
                && k.chars()
                    .all(|c| c.is_ascii_uppercase() || c.is_ascii_digit() || c == '_')
                && k.starts_with(|c: char| c.is_ascii_uppercase());
            is_name.then(|| (k.to_string(), v.to_string()))
        })
        .collect()
}

const ENV_EXAMPLE: &str = "systemd/tessera.env.example";

/// The invocation of a unit's ExecStart=, with the environment from Environment=
/// and, for an EnvironmentFile= named `tessera.env`, the variables of
/// deploy/systemd/tessera.env.example that this program reads.
fn unit_invocation(source: &str, text: &str, env_example: &str) -> Result<Invocation, String> {
    let unit = Unit::parse(text);
    let exec = unit.values("Service", "ExecStart");
    if exec.len() != 1 {
        return Err(format!(
            "{source}: needs exactly one ExecStart=, found {}",
            exec.len()
        ));
    }
    let words = split_words(exec[0].trim_start_matches(['-', '@', ':', '+', '!']));
    let program = basename(words.first().ok_or(format!("{source}: empty ExecStart="))?).to_string();
    let mut env: Vec<(String, Option<String>)> = Vec::new();
    for line in unit.values("Service", "Environment") {
        for w in split_words(line) {
            match w.split_once('=') {
                Some((k, v)) => env.push((k.to_string(), Some(v.to_string()))),
                None => return Err(format!("{source}: Environment={line} is not NAME=value")),
            }
        }
    }
    let program_env = cli_of(&program).map(|c| c.env).unwrap_or(&[]);
    for file in unit.values("Service", "EnvironmentFile") {
        let optional = file.starts_with('-');
        let path = file.trim_start_matches('-');
        if basename(path) == "tessera.env" {
            for (k, v) in env_file_entries(env_example) {
                if program_env.contains(&k.as_str()) {
                    // EnvironmentFile= overrides Environment=.
                    env.retain(|(n, _)| *n != k);
                    env.push((k, Some(v)));
                }
            }
        } else if !optional {
            return Err(format!(
                "{source}: required EnvironmentFile={path} has no example under deploy/"
            ));
        }
    }
    Ok(Invocation {
        source: source.to_string(),
        program,
        args: words[1..].to_vec(),
        env,
    })
}

fn systemd_invocations() -> Vec<Invocation> {
    let example = read(ENV_EXAMPLE);
    files_in("systemd", ".service")
        .iter()
        .map(|p| {
            let text = std::fs::read_to_string(p).expect("unit file");
            unit_invocation(&rel_name(p), &text, &example).unwrap_or_else(|e| panic!("{e}"))
        })
        .collect()
}

/// Unit-specific checks beyond the command line: `${VAR}` in ExecStart= must be set
/// by the unit itself (else systemd passes an empty word), and the hardening asked
/// for is present.
fn check_unit(source: &str, text: &str) -> Vec<String> {
    let mut errors = Vec::new();
    let unit = Unit::parse(text);
    let defined: BTreeSet<String> = unit
        .values("Service", "Environment")
        .iter()
        .flat_map(|l| split_words(l))
        .filter_map(|w| w.split_once('=').map(|(k, _)| k.to_string()))
        .collect();
    for exec in unit.values("Service", "ExecStart") {
        let mut rest = exec;
        while let Some(start) = rest.find("${") {
            let after = &rest[start + 2..];
            let Some(end) = after.find('}') else { break };
            let name = &after[..end];
            if !defined.contains(name) {
                errors.push(format!(
                    "{source}: ExecStart= uses ${{{name}}} but no Environment= of the unit sets a default for it"
                ));
            }
            rest = &after[end..];
        }
    }
    let want = [
        ("ProtectSystem", "strict"),
        ("ProtectHome", "yes"),
        ("PrivateTmp", "yes"),
        ("NoNewPrivileges", "yes"),
        ("KillSignal", "SIGTERM"),
        ("Restart", "on-failure"),
    ];
    for (key, value) in want {
        if unit.last("Service", key) != Some(value) {
            errors.push(format!(
                "{source}: [Service] {key}= must be {value}, found {:?}",
                unit.last("Service", key)
            ));
        }
    }
    for key in [
        "RestrictAddressFamilies",
        "MemoryMax",
        "TimeoutStopSec",
        "EnvironmentFile",
    ] {
        if unit.last("Service", key).is_none() {
            errors.push(format!("{source}: [Service] lacks {key}="));
        }
    }
    let dynamic = unit.last("Service", "DynamicUser") == Some("yes");
    if !dynamic && unit.last("Service", "User").is_none() {
        errors.push(format!(
            "{source}: runs as root: set DynamicUser=yes or User="
        ));
    }
    if unit.last("Install", "WantedBy").is_none() {
        errors.push(format!(
            "{source}: [Install] lacks WantedBy= (systemctl enable would do nothing)"
        ));
    }
    errors
}

// --- Kubernetes manifests ---------------------------------------------------

/// One parsed YAML document with the file it came from.
#[derive(Clone)]
struct Doc {
    file: String,
    value: Value,
}

fn load_yaml(file: &str, text: &str) -> Result<Vec<Doc>, String> {
    use serde::Deserialize;
    let mut docs = Vec::new();
    for (i, de) in serde_norway::Deserializer::from_str(text).enumerate() {
        let value =
            Value::deserialize(de).map_err(|e| format!("{file}: document {}: {e}", i + 1))?;
        if !value.is_null() {
            docs.push(Doc {
                file: file.to_string(),
                value,
            });
        }
    }
    Ok(docs)
}

fn kubernetes_docs() -> Vec<Doc> {
    let mut docs = Vec::new();
    for p in files_in("kubernetes", ".yaml") {
        let text = std::fs::read_to_string(&p).expect("manifest");
        docs.extend(load_yaml(&rel_name(&p), &text).unwrap_or_else(|e| panic!("{e}")));
    }
    assert!(!docs.is_empty(), "no YAML under deploy/kubernetes");
    docs
}

fn at<'a>(v: &'a Value, path: &[&str]) -> Option<&'a Value> {
    path.iter().try_fold(v, |v, k| v.get(*k))
}

fn str_at<'a>(v: &'a Value, path: &[&str]) -> Option<&'a str> {
    at(v, path).and_then(Value::as_str)
}

fn seq_at<'a>(v: &'a Value, path: &[&str]) -> &'a [Value] {
    at(v, path)
        .and_then(Value::as_sequence)
        .map(Vec::as_slice)
        .unwrap_or(&[])
}

fn kind(d: &Doc) -> &str {
    str_at(&d.value, &["kind"]).unwrap_or("")
}

fn name(d: &Doc) -> &str {
    str_at(&d.value, &["metadata", "name"]).unwrap_or("")
}

fn here(d: &Doc) -> String {
    format!("{} ({} {})", d.file, kind(d), name(d))
}

/// A label map as strings; a non-string value is reported (the API rejects it).
fn string_map(v: Option<&Value>, what: &str, errors: &mut Vec<String>) -> BTreeMap<String, String> {
    let mut out = BTreeMap::new();
    if let Some(m) = v.and_then(Value::as_mapping) {
        for (k, val) in m {
            let k = k.as_str().unwrap_or("?").to_string();
            match val.as_str() {
                Some(s) => {
                    out.insert(k, s.to_string());
                }
                None => errors.push(format!(
                    "{what}: value of '{k}' must be a string (quote it), found {val:?}"
                )),
            }
        }
    }
    out
}

fn is_subset(a: &BTreeMap<String, String>, b: &BTreeMap<String, String>) -> bool {
    a.iter().all(|(k, v)| b.get(k) == Some(v))
}

/// The stable (apiVersion, kind) pairs the manifests may use.
const KNOWN_KINDS: [(&str, &str); 6] = [
    ("apps/v1", "StatefulSet"),
    ("apps/v1", "Deployment"),
    ("v1", "Service"),
    ("v1", "Secret"),
    ("autoscaling/v2", "HorizontalPodAutoscaler"),
    ("kustomize.config.k8s.io/v1beta1", "Kustomization"),
];

const SECRET_EXAMPLE: &str = "deploy/kubernetes/secret.example.yaml";

/// The invocations of every container of every workload.
fn kubernetes_invocations(docs: &[Doc]) -> Vec<Invocation> {
    let mut out = Vec::new();
    for d in docs
        .iter()
        .filter(|d| matches!(kind(d), "StatefulSet" | "Deployment"))
    {
        for c in seq_at(&d.value, &["spec", "template", "spec", "containers"]) {
            let words: Vec<String> = seq_at(c, &["command"])
                .iter()
                .chain(seq_at(c, &["args"]))
                .map(|w| {
                    w.as_str()
                        .map(str::to_string)
                        .unwrap_or_else(|| format!("{w:?}"))
                })
                .collect();
            let env = seq_at(c, &["env"])
                .iter()
                .map(|e| {
                    (
                        str_at(e, &["name"]).unwrap_or("").to_string(),
                        str_at(e, &["value"]).map(str::to_string),
                    )
                })
                .collect();
            out.push(Invocation {
                source: format!(
                    "{} container {}",
                    here(d),
                    str_at(c, &["name"]).unwrap_or("?")
                ),
                program: words
                    .first()
                    .map(|w| basename(w).to_string())
                    .unwrap_or_default(),
                args: words.iter().skip(1).cloned().collect(),
                env,
            });
        }
    }
    out
}

/// Every check of the manifests that needs no outside tool; returns the problems.
fn check_kubernetes(docs: &[Doc]) -> Vec<String> {
    let mut errors = Vec::new();
    let mut by_kind: BTreeMap<&str, Vec<&Doc>> = BTreeMap::new();
    for d in docs {
        let api = str_at(&d.value, &["apiVersion"]).unwrap_or("");
        if !KNOWN_KINDS.iter().any(|&(a, k)| a == api && k == kind(d)) {
            errors.push(format!(
                "{}: unknown apiVersion/kind {api}/{}",
                d.file,
                kind(d)
            ));
        }
        if kind(d) != "Kustomization" && name(d).is_empty() {
            errors.push(format!("{}: {} without metadata.name", d.file, kind(d)));
        }
        string_map(
            at(&d.value, &["metadata", "labels"]),
            &format!("{} metadata.labels", here(d)),
            &mut errors,
        );
        by_kind.entry(kind(d)).or_default().push(d);
    }
    let of = |k: &str| by_kind.get(k).cloned().unwrap_or_default();

    // Workloads: selectors, pod labels and annotations, containers.
    let mut pod_labels: BTreeMap<String, BTreeMap<String, String>> = BTreeMap::new();
    for d in of("StatefulSet").into_iter().chain(of("Deployment")) {
        let h = here(d);
        let tmpl = at(&d.value, &["spec", "template"]);
        let labels = string_map(
            tmpl.and_then(|t| at(t, &["metadata", "labels"])),
            &format!("{h} pod labels"),
            &mut errors,
        );
        let sel = string_map(
            at(&d.value, &["spec", "selector", "matchLabels"]),
            &format!("{h} selector"),
            &mut errors,
        );
        if sel.is_empty() || !is_subset(&sel, &labels) {
            errors.push(format!("{h}: spec.selector.matchLabels {sel:?} must be non-empty and among the pod labels {labels:?}"));
        }
        string_map(
            tmpl.and_then(|t| at(t, &["metadata", "annotations"])),
            &format!("{h} pod annotations"),
            &mut errors,
        );
        if let Some(spec) = tmpl.and_then(|t| at(t, &["spec"])) {
            if at(spec, &["terminationGracePeriodSeconds"])
                .and_then(Value::as_u64)
                .is_none()
            {
                errors.push(format!("{h}: pod spec lacks terminationGracePeriodSeconds"));
            }
            if at(spec, &["securityContext", "runAsNonRoot"]).and_then(Value::as_bool) != Some(true)
            {
                errors.push(format!(
                    "{h}: pod securityContext.runAsNonRoot must be true"
                ));
            }
            for c in seq_at(spec, &["containers"]) {
                let cn = str_at(c, &["name"]).unwrap_or("?");
                for part in ["requests", "limits"] {
                    for res in ["cpu", "memory"] {
                        if at(c, &["resources", part, res]).is_none() {
                            errors
                                .push(format!("{h} container {cn}: lacks resources.{part}.{res}"));
                        }
                    }
                }
                if at(c, &["envFrom"]).is_some() {
                    errors.push(format!("{h} container {cn}: envFrom hides which variables are set; list env: entries"));
                }
                for e in seq_at(c, &["env"]) {
                    if let Some(rf) = at(e, &["valueFrom", "resourceFieldRef"]) {
                        if str_at(rf, &["containerName"]) != Some(cn) {
                            errors.push(format!(
                                "{h} container {cn}: resourceFieldRef names another container"
                            ));
                        }
                    }
                }
            }
        }
        pod_labels.insert(name(d).to_string(), labels);
    }

    // The server: one StatefulSet, one replica, the database on its claim, probes, metrics.
    let sts = of("StatefulSet");
    if sts.len() != 1 {
        errors.push(format!(
            "deploy/kubernetes: needs exactly one StatefulSet (the server), found {}",
            sts.len()
        ));
    }
    let invocations = kubernetes_invocations(docs);
    for d in &sts {
        let h = here(d);
        if at(&d.value, &["spec", "replicas"]).and_then(Value::as_u64) != Some(1) {
            errors.push(format!("{h}: spec.replicas must be 1 (one SQLite writer)"));
        }
        let claims: Vec<&str> = seq_at(&d.value, &["spec", "volumeClaimTemplates"])
            .iter()
            .filter_map(|v| str_at(v, &["metadata", "name"]))
            .collect();
        if claims.is_empty() {
            errors.push(format!(
                "{h}: needs a volumeClaimTemplate for the SQLite file"
            ));
        }
        let governing = str_at(&d.value, &["spec", "serviceName"]).unwrap_or("");
        let headless = of("Service").iter().any(|s| {
            name(s) == governing && str_at(&s.value, &["spec", "clusterIP"]) == Some("None")
        });
        if !headless {
            errors.push(format!("{h}: spec.serviceName '{governing}' must name a headless Service (clusterIP: None)"));
        }
        let containers = seq_at(&d.value, &["spec", "template", "spec", "containers"]);
        let Some(c) = containers.iter().find(|c| {
            seq_at(c, &["command"])
                .first()
                .and_then(Value::as_str)
                .map(basename)
                == Some("tessera-server")
        }) else {
            errors.push(format!("{h}: no container runs tessera-server"));
            continue;
        };
        let inv = invocations
            .iter()
            .find(|i| i.source.starts_with(&h) && i.program == "tessera-server");
        let listen_port = inv
            .and_then(|i| i.flag_value("--listen").or(i.env_value("TESSERA_LISTEN")))
            .and_then(port_of);
        let ports: Vec<(Option<&str>, Option<u64>)> = seq_at(c, &["ports"])
            .iter()
            .map(|p| {
                (
                    str_at(p, &["name"]),
                    at(p, &["containerPort"]).and_then(Value::as_u64),
                )
            })
            .collect();
        if listen_port.is_none()
            || !ports
                .iter()
                .any(|(_, n)| n.map(|n| n as u16) == listen_port)
        {
            errors.push(format!(
                "{h}: containerPort {ports:?} must equal the --listen port {listen_port:?}"
            ));
        }
        let resolve = |p: Option<&Value>| -> Option<u64> {
            match p? {
                Value::Number(n) => n.as_u64(),
                Value::String(s) => ports
                    .iter()
                    .find(|(n, _)| *n == Some(s.as_str()))
                    .and_then(|(_, n)| *n),
                _ => None,
            }
        };
        for probe in ["readinessProbe", "livenessProbe", "startupProbe"] {
            let Some(pr) = at(c, &[probe]) else {
                if probe != "startupProbe" {
                    errors.push(format!("{h}: server container lacks {probe}"));
                }
                continue;
            };
            if str_at(pr, &["httpGet", "path"]) != Some("/healthz") {
                errors.push(format!(
                    "{h}: {probe} must be httpGet on /healthz, found {:?}",
                    at(pr, &["httpGet", "path"])
                ));
            }
            if resolve(at(pr, &["httpGet", "port"])).map(|n| n as u16) != listen_port {
                errors.push(format!(
                    "{h}: {probe} port does not resolve to the server's port {listen_port:?}"
                ));
            }
        }
        let db = inv
            .and_then(|i| i.flag_value("--db").or(i.env_value("TESSERA_DB")))
            .unwrap_or("");
        let db_dir = db.rsplit_once('/').map(|(d, _)| d).unwrap_or("");
        let on_claim = seq_at(c, &["volumeMounts"]).iter().any(|m| {
            str_at(m, &["mountPath"]) == Some(db_dir)
                && claims.contains(&str_at(m, &["name"]).unwrap_or(""))
        });
        if !on_claim {
            errors.push(format!("{h}: the database directory '{db_dir}' is not a mount of a volumeClaimTemplate {claims:?}"));
        }
        let ann = at(&d.value, &["spec", "template", "metadata", "annotations"]);
        let a = |k: &str| ann.and_then(|m| m.get(k)).and_then(Value::as_str);
        if a("prometheus.io/scrape") != Some("true") {
            errors.push(format!(
                "{h}: pod annotation prometheus.io/scrape must be the string \"true\""
            ));
        }
        if a("prometheus.io/path") != Some("/metrics") {
            errors.push(format!(
                "{h}: pod annotation prometheus.io/path must be \"/metrics\""
            ));
        }
        if a("prometheus.io/port").and_then(|p| p.parse::<u16>().ok()) != listen_port {
            errors.push(format!(
                "{h}: pod annotation prometheus.io/port must be the server's port {listen_port:?}"
            ));
        }
    }

    // Services select the server pods (and only them), on the server's port.
    let server_labels: Vec<&BTreeMap<String, String>> =
        sts.iter().filter_map(|d| pod_labels.get(name(d))).collect();
    for s in of("Service") {
        let h = here(s);
        let sel = string_map(
            at(&s.value, &["spec", "selector"]),
            &format!("{h} selector"),
            &mut errors,
        );
        let selects_server = server_labels
            .iter()
            .any(|l| !sel.is_empty() && is_subset(&sel, l));
        if !selects_server {
            errors.push(format!(
                "{h}: spec.selector {sel:?} does not select the StatefulSet's pod labels"
            ));
        }
        for (wl, labels) in &pod_labels {
            let is_server = sts.iter().any(|d| name(d) == wl.as_str());
            if !is_server && !sel.is_empty() && is_subset(&sel, labels) {
                errors.push(format!(
                    "{h}: spec.selector also selects the pods of '{wl}'"
                ));
            }
        }
        if seq_at(&s.value, &["spec", "ports"]).is_empty() {
            errors.push(format!("{h}: no ports"));
        }
    }

    // The worker Deployment and its autoscaler.
    let worker_deploys: Vec<&Doc> = of("Deployment")
        .into_iter()
        .filter(|d| {
            seq_at(&d.value, &["spec", "template", "spec", "containers"])
                .iter()
                .any(|c| {
                    seq_at(c, &["command"])
                        .first()
                        .and_then(Value::as_str)
                        .map(basename)
                        == Some("tessera-worker")
                })
        })
        .collect();
    if worker_deploys.is_empty() {
        errors.push("deploy/kubernetes: no Deployment runs tessera-worker".to_string());
    }
    let hpas = of("HorizontalPodAutoscaler");
    if hpas.is_empty() {
        errors.push("deploy/kubernetes: no HorizontalPodAutoscaler for the workers".to_string());
    }
    for h in hpas {
        let hh = here(h);
        let target = at(&h.value, &["spec", "scaleTargetRef"]);
        let t = |k: &str| target.and_then(|t| str_at(t, &[k]));
        let ok = t("apiVersion") == Some("apps/v1")
            && t("kind") == Some("Deployment")
            && worker_deploys.iter().any(|d| Some(name(d)) == t("name"));
        if !ok {
            errors.push(format!(
                "{hh}: scaleTargetRef must be apps/v1 Deployment of the workers, found {target:?}"
            ));
        }
        let cpu = seq_at(&h.value, &["spec", "metrics"]).iter().any(|m| {
            str_at(m, &["type"]) == Some("Resource")
                && str_at(m, &["resource", "name"]) == Some("cpu")
        });
        if !cpu {
            errors.push(format!("{hh}: needs a Resource metric on cpu"));
        }
        let min = at(&h.value, &["spec", "minReplicas"])
            .and_then(Value::as_u64)
            .unwrap_or(1);
        let max = at(&h.value, &["spec", "maxReplicas"])
            .and_then(Value::as_u64)
            .unwrap_or(0);
        if !(1 <= min && min <= max) {
            errors.push(format!(
                "{hh}: needs 1 <= minReplicas ({min}) <= maxReplicas ({max})"
            ));
        }
    }
    // The workers reach the server through a Service, by name and port.
    let services: Vec<(String, Vec<u64>)> = of("Service")
        .iter()
        .map(|s| {
            let ports = seq_at(&s.value, &["spec", "ports"])
                .iter()
                .filter_map(|p| at(p, &["port"]).and_then(Value::as_u64))
                .collect();
            (name(s).to_string(), ports)
        })
        .collect();
    for inv in invocations.iter().filter(|i| i.program == "tessera-worker") {
        let url = inv
            .flag_value("--server")
            .or(inv.env_value("TESSERA_SERVER"))
            .unwrap_or("");
        let host = host_of_url(url).unwrap_or("");
        let host = host.split('.').next().unwrap_or(host);
        let port = port_of(url).map(u64::from);
        if !services
            .iter()
            .any(|(n, ps)| n == host && port.is_some_and(|p| ps.contains(&p)))
        {
            errors.push(format!(
                "{}: TESSERA_SERVER '{url}' is not a Service name and port {services:?}",
                inv.source
            ));
        }
    }

    // Secret references resolve to keys of the example Secret, which holds placeholders only.
    let mut secret_keys: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for s in of("Secret") {
        if s.file != SECRET_EXAMPLE {
            errors.push(format!(
                "{}: Secrets belong in {SECRET_EXAMPLE} only (with placeholders)",
                here(s)
            ));
        }
        let mut keys = BTreeSet::new();
        for field in ["stringData", "data"] {
            for (k, v) in at(&s.value, &[field])
                .and_then(Value::as_mapping)
                .into_iter()
                .flatten()
            {
                let k = k.as_str().unwrap_or("?").to_string();
                if !v.as_str().is_some_and(|v| v.starts_with("REPLACE")) {
                    errors.push(format!(
                        "{}: {field}.{k} must be a placeholder starting with REPLACE",
                        here(s)
                    ));
                }
                keys.insert(k);
            }
        }
        secret_keys.insert(name(s).to_string(), keys);
    }
    let mut refs = 0;
    for d in of("StatefulSet").into_iter().chain(of("Deployment")) {
        for c in seq_at(&d.value, &["spec", "template", "spec", "containers"]) {
            for e in seq_at(c, &["env"]) {
                let Some(r) = at(e, &["valueFrom", "secretKeyRef"]) else {
                    continue;
                };
                refs += 1;
                let (sn, sk) = (
                    str_at(r, &["name"]).unwrap_or(""),
                    str_at(r, &["key"]).unwrap_or(""),
                );
                if !secret_keys.get(sn).is_some_and(|ks| ks.contains(sk)) {
                    errors.push(format!(
                        "{}: env {} refers to Secret {sn} key {sk}, which {SECRET_EXAMPLE} does not define",
                        here(d),
                        str_at(e, &["name"]).unwrap_or("?")
                    ));
                }
            }
        }
    }
    if refs == 0 {
        errors.push(
            "deploy/kubernetes: no env comes from a secretKeyRef (the worker token must)"
                .to_string(),
        );
    }

    // The kustomization lists every manifest but the example Secret.
    for k in of("Kustomization") {
        let listed: BTreeSet<&str> = seq_at(&k.value, &["resources"])
            .iter()
            .filter_map(Value::as_str)
            .collect();
        let files: BTreeSet<String> = docs
            .iter()
            .map(|d| basename(&d.file).to_string())
            .filter(|f| f != "kustomization.yaml" && f != basename(SECRET_EXAMPLE))
            .collect();
        for f in &files {
            if !listed.contains(f.as_str()) {
                errors.push(format!("{}: resources does not list {f}", k.file));
            }
        }
        for l in &listed {
            if !files.contains(*l) {
                errors.push(format!(
                    "{}: resources lists {l}, which is not a manifest here",
                    k.file
                ));
            }
        }
    }

    for inv in &invocations {
        errors.extend(check_invocation(inv));
    }
    errors
}

// --- Slurm script -----------------------------------------------------------

const SBATCH: &str = "slurm/tessera-workers.sbatch";

/// `#SBATCH --key=value` directives.
fn sbatch_directives(text: &str) -> BTreeMap<String, String> {
    text.lines()
        .filter_map(|l| l.strip_prefix("#SBATCH "))
        .map(|d| {
            let d = d.trim();
            let (k, v) = d.split_once('=').unwrap_or((d, ""));
            (k.to_string(), v.to_string())
        })
        .collect()
}

/// The script's start of the worker: the one command line whose program (after
/// `${VAR:-default}` becomes its default) is tessera-worker; environment from `export`.
fn sbatch_invocation(source: &str, text: &str) -> Result<Invocation, String> {
    let code: Vec<&str> = text
        .lines()
        .map(str::trim)
        .filter(|l| !l.starts_with('#') && !l.is_empty())
        .collect();
    let mut found = Vec::new();
    for line in &code {
        let words = split_words(line);
        let Some(first) = words.first() else { continue };
        let program = match first.strip_prefix("${").and_then(|r| r.strip_suffix('}')) {
            Some(inner) => inner
                .split_once(":-")
                .map(|(_, d)| d)
                .unwrap_or(inner)
                .to_string(),
            None => first.clone(),
        };
        if basename(&program) == "tessera-worker" {
            let args: Vec<String> = words[1..]
                .iter()
                .take_while(|w| *w != "&")
                .cloned()
                .collect();
            found.push((program, args));
        }
    }
    if found.len() != 1 {
        return Err(format!(
            "{source}: expected one command starting tessera-worker, found {}",
            found.len()
        ));
    }
    let (program, args) = found.remove(0);
    let env = code
        .iter()
        .filter_map(|l| l.strip_prefix("export "))
        .flat_map(split_words)
        .map(|w| (w.split('=').next().unwrap_or(&w).to_string(), None))
        .collect();
    Ok(Invocation {
        source: source.to_string(),
        program: basename(&program).to_string(),
        args,
        env,
    })
}

/// Seconds of a Slurm time limit: `MM`, `HH:MM:SS`, `D-HH:MM:SS`, ...
fn slurm_seconds(v: &str) -> Option<u64> {
    let (days, rest) = match v.split_once('-') {
        Some((d, r)) => (d.parse::<u64>().ok()?, r),
        None => (0, v),
    };
    let parts: Vec<u64> = rest
        .split(':')
        .map(|p| p.parse().ok())
        .collect::<Option<_>>()?;
    let s = match parts.as_slice() {
        [m] if days == 0 => m * 60,
        [h] => h * 3600,
        [m, s] if days == 0 => m * 60 + s,
        [h, m] => h * 3600 + m * 60,
        [h, m, s] => h * 3600 + m * 60 + s,
        _ => return None,
    };
    Some(days * 86400 + s)
}

/// The graceful-stop lead time of `--signal=B:TERM@N`; checks the form.
fn check_sbatch(source: &str, text: &str) -> (Vec<String>, Option<u64>) {
    let mut errors = Vec::new();
    let d = sbatch_directives(text);
    if d.get("--array").is_none_or(|a| a.is_empty()) {
        errors.push(format!("{source}: lacks #SBATCH --array="));
    }
    let time = d.get("--time").and_then(|t| slurm_seconds(t));
    if time.is_none() {
        errors.push(format!("{source}: lacks a readable #SBATCH --time="));
    }
    let mut lead = None;
    match d.get("--signal") {
        Some(sig) => {
            // Without srun there is no job step: only B: (the batch shell) gets the signal.
            let uses_srun = text
                .lines()
                .any(|l| !l.trim_start().starts_with('#') && l.contains("srun "));
            if !uses_srun && !sig.starts_with("B:") {
                errors.push(format!(
                    "{source}: --signal={sig} must start with B: (the script starts no job step)"
                ));
            }
            let body = sig.trim_start_matches("B:").trim_start_matches("R:");
            match body.split_once('@') {
                Some(("TERM" | "SIGTERM" | "15", n)) => lead = n.parse::<u64>().ok(),
                _ => errors.push(format!(
                    "{source}: --signal={sig} must send TERM at a lead time (TERM@seconds)"
                )),
            }
            if lead.is_none() {
                errors.push(format!(
                    "{source}: --signal={sig} has no lead time in seconds"
                ));
            }
        }
        None => errors.push(format!(
            "{source}: lacks #SBATCH --signal= (the worker would be killed mid-cell)"
        )),
    }
    if let (Some(t), Some(l)) = (time, lead) {
        if l >= t {
            errors.push(format!(
                "{source}: the signal lead time {l}s is not below the time limit {t}s"
            ));
        }
    }
    let has_trap = text
        .lines()
        .any(|l| l.trim_start().starts_with("trap ") && l.contains("TERM"));
    if !has_trap {
        errors.push(format!(
            "{source}: no `trap ... TERM` to forward the stop to the worker"
        ));
    }
    (errors, lead)
}

// ---------------------------------------------------------------------------
// Tests: the shipped files.
// ---------------------------------------------------------------------------

/// Every invocation in every deployment file: systemd units, Kubernetes
/// containers, the Slurm script, and the container image's default command.
fn all_invocations() -> Vec<Invocation> {
    let mut all = systemd_invocations();
    all.extend(kubernetes_invocations(&kubernetes_docs()));
    all.push(
        sbatch_invocation(&format!("deploy/{SBATCH}"), &read(SBATCH))
            .unwrap_or_else(|e| panic!("{e}")),
    );
    all.push(containerfile_invocation());
    all
}

/// The image's `CMD` with its `ENV` (the ENV reaches both binaries).
fn containerfile_invocation() -> Invocation {
    let cf = containerfile_instructions(&read("container/Containerfile"));
    let cmd: Vec<String> = cf
        .iter()
        .rev()
        .find(|(i, _)| i == "CMD")
        .and_then(|(_, a)| serde_json::from_str(a).ok())
        .expect("Containerfile needs CMD [\"program\", ...] in JSON form");
    let program = basename(&cmd[0]).to_string();
    let own_env = cli_of(&program).map(|c| c.env).unwrap_or(&[]);
    let env = containerfile_env(&cf)
        .into_iter()
        .filter(|(k, _)| own_env.contains(&k.as_str()))
        .map(|(k, v)| (k, Some(v)))
        .collect();
    Invocation {
        source: "deploy/container/Containerfile CMD".into(),
        program,
        args: cmd[1..].to_vec(),
        env,
    }
}

/// (INSTRUCTION, arguments) with continuation lines joined.
fn containerfile_instructions(text: &str) -> Vec<(String, String)> {
    let mut out = Vec::new();
    let mut pending = String::new();
    for line in text.lines() {
        let t = line.trim();
        if t.starts_with('#') || (t.is_empty() && pending.is_empty()) {
            continue;
        }
        if let Some(c) = t.strip_suffix('\\') {
            pending.push_str(c);
            pending.push(' ');
            continue;
        }
        let full = format!("{pending}{t}");
        pending.clear();
        if let Some((i, rest)) = full.split_once(char::is_whitespace) {
            out.push((i.to_uppercase(), rest.trim().to_string()));
        }
    }
    out
}

fn containerfile_env(cf: &[(String, String)]) -> Vec<(String, String)> {
    cf.iter()
        .filter(|(i, _)| i == "ENV")
        .flat_map(|(_, a)| split_words(a))
        .filter_map(|w| {
            w.split_once('=')
                .map(|(k, v)| (k.to_string(), v.to_string()))
        })
        .collect()
}

#[test]
fn every_invocation_uses_only_the_agreed_flags_and_environment() {
    let all = all_invocations();
    let mut errors = Vec::new();
    for inv in &all {
        errors.extend(check_invocation(inv));
    }
    assert_no_errors("command lines of deploy/", &errors);
    // Both binaries are deployed by each of systemd, Kubernetes and (workers) Slurm.
    for (program, at_least) in [("tessera-server", 3), ("tessera-worker", 3)] {
        let n = all.iter().filter(|i| i.program == program).count();
        assert!(
            n >= at_least,
            "{program} is started by {n} deployment file(s), expected {at_least}: {all:#?}"
        );
    }
    // The normalized list, printed for the reader of a failing merge.
    for inv in &all {
        eprintln!(
            "{}: {} {}",
            inv.source,
            inv.program,
            inv.normalized().join(" ")
        );
    }
}

#[test]
fn env_files_set_only_known_variables() {
    let known = all_contract_env();
    let mut errors = Vec::new();
    let example = env_file_entries(&read(ENV_EXAMPLE));
    for (k, _) in &example {
        if !known.contains(k.as_str()) {
            errors.push(format!(
                "deploy/{ENV_EXAMPLE}: '{k}' is read by neither binary"
            ));
        }
    }
    let names: BTreeSet<&str> = example.iter().map(|(k, _)| k.as_str()).collect();
    for needed in ["TESSERA_SERVER", "TESSERA_TOKEN"] {
        if !names.contains(needed) {
            errors.push(format!(
                "deploy/{ENV_EXAMPLE}: lacks {needed}, which the worker unit needs"
            ));
        }
    }
    // The workers of the example reach the server of the example.
    let get = |k: &str| {
        example
            .iter()
            .find(|(n, _)| n == k)
            .map(|(_, v)| v.as_str())
    };
    if get("TESSERA_LISTEN").and_then(port_of) != get("TESSERA_SERVER").and_then(port_of) {
        errors.push(format!(
            "deploy/{ENV_EXAMPLE}: TESSERA_SERVER's port differs from TESSERA_LISTEN's"
        ));
    }
    let cf = containerfile_instructions(&read("container/Containerfile"));
    for (k, _) in containerfile_env(&cf) {
        if !known.contains(k.as_str()) {
            errors.push(format!(
                "deploy/container/Containerfile: ENV {k} is read by neither binary"
            ));
        }
    }
    assert_no_errors("environment files", &errors);
}

#[test]
fn systemd_units_have_the_hardening_and_settings_asked_for() {
    let mut errors = Vec::new();
    let units = files_in("systemd", ".service");
    let names: Vec<String> = units.iter().map(|p| rel_name(p)).collect();
    for want in [
        "deploy/systemd/tessera-server.service",
        "deploy/systemd/tessera-worker@.service",
    ] {
        assert!(
            names.iter().any(|n| n == want),
            "missing {want}; have {names:?}"
        );
    }
    for p in &units {
        errors.extend(check_unit(
            &rel_name(p),
            &std::fs::read_to_string(p).expect("unit"),
        ));
    }
    let server = Unit::parse(&read("systemd/tessera-server.service"));
    if server.last("Service", "StateDirectory").is_none() {
        errors.push("tessera-server.service: lacks StateDirectory= for the SQLite file".into());
    }
    let db = systemd_invocations()
        .into_iter()
        .find(|i| i.program == "tessera-server")
        .and_then(|i| i.env_value("TESSERA_DB").map(str::to_string))
        .unwrap_or_default();
    let state = format!(
        "/var/lib/{}/",
        server.last("Service", "StateDirectory").unwrap_or("?")
    );
    if !db.starts_with(&state) {
        errors.push(format!(
            "tessera-server.service: TESSERA_DB={db} is not under the StateDirectory {state}"
        ));
    }
    assert_no_errors("systemd units", &errors);
}

#[test]
fn kubernetes_manifests_parse_and_agree() {
    let docs = kubernetes_docs();
    assert_no_errors("deploy/kubernetes", &check_kubernetes(&docs));
}

#[test]
fn slurm_script_stops_the_worker_before_the_time_limit() {
    let (errors, lead) = check_sbatch(&format!("deploy/{SBATCH}"), &read(SBATCH));
    assert_no_errors("Slurm script", &errors);
    assert!(lead.is_some());
}

/// The three graceful-stop budgets are one figure: what the worker may take to
/// finish or release its cells after SIGTERM.
#[test]
fn graceful_stop_budget_is_the_same_everywhere() {
    let unit = Unit::parse(&read("systemd/tessera-worker@.service"));
    let systemd = unit
        .last("Service", "TimeoutStopSec")
        .and_then(systemd_seconds);
    let docs = kubernetes_docs();
    let kube = docs
        .iter()
        .find(|d| kind(d) == "Deployment")
        .and_then(|d| {
            at(
                &d.value,
                &["spec", "template", "spec", "terminationGracePeriodSeconds"],
            )
        })
        .and_then(Value::as_u64);
    let (_, slurm) = check_sbatch(SBATCH, &read(SBATCH));
    assert!(systemd.is_some() && systemd == kube && kube == slurm,
        "TimeoutStopSec {systemd:?} (systemd), terminationGracePeriodSeconds {kube:?} (Kubernetes) and the \
         --signal lead time {slurm:?} (Slurm) must be one figure");
}

#[test]
fn container_build_makes_both_binaries_on_a_slim_debian() {
    let cf = containerfile_instructions(&read("container/Containerfile"));
    let from: Vec<&str> = cf
        .iter()
        .filter(|(i, _)| i == "FROM")
        .map(|(_, a)| a.as_str())
        .collect();
    assert!(
        from.len() >= 2,
        "multi-stage build expected, FROM lines: {from:?}"
    );
    let build = cf
        .iter()
        .find(|(i, a)| i == "RUN" && a.contains("cargo build"))
        .map(|(_, a)| a.as_str());
    let build = build.expect("a RUN with cargo build");
    for part in ["--release", "-p tessera-server", "-p tessera-worker"] {
        assert!(build.contains(part), "cargo build lacks {part}: {build}");
    }
    // The runtime stage: a slim Debian (resolved through ARG defaults), non-root, both binaries.
    let args: BTreeMap<String, String> = cf
        .iter()
        .filter(|(i, _)| i == "ARG")
        .filter_map(|(_, a)| {
            a.split_once('=')
                .map(|(k, v)| (k.to_string(), v.to_string()))
        })
        .collect();
    let last = from.last().unwrap();
    let runtime = match last.strip_prefix("${").and_then(|r| r.strip_suffix('}')) {
        Some(arg) => args.get(arg).cloned().unwrap_or_default(),
        None => last.to_string(),
    };
    assert!(
        runtime.contains("debian") && runtime.contains("slim"),
        "runtime image {runtime:?} is not a slim Debian"
    );
    let copy = cf
        .iter()
        .rev()
        .find(|(i, _)| i == "COPY")
        .map(|(_, a)| a.as_str())
        .unwrap_or("");
    assert!(
        copy.contains("tessera-server") && copy.contains("tessera-worker"),
        "final COPY lacks a binary: {copy}"
    );
    let user = cf
        .iter()
        .rev()
        .find(|(i, _)| i == "USER")
        .map(|(_, a)| a.as_str())
        .unwrap_or("root");
    let uid = user.split(':').next().unwrap_or("");
    assert!(
        uid.parse::<u32>().is_ok_and(|u| u != 0),
        "USER {user:?} must be a non-root numeric UID"
    );
    // The manifests run as that UID.
    for d in kubernetes_docs()
        .iter()
        .filter(|d| matches!(kind(d), "StatefulSet" | "Deployment"))
    {
        let run_as = at(
            &d.value,
            &["spec", "template", "spec", "securityContext", "runAsUser"],
        )
        .and_then(Value::as_u64);
        assert_eq!(
            run_as.map(|u| u.to_string()).as_deref(),
            Some(uid),
            "{}: runAsUser differs from the image's USER",
            here(d)
        );
    }
}

#[test]
fn ci_package_list_names_every_tool_the_checks_run() {
    let list = read("ci-packages.txt");
    let pkgs: BTreeSet<&str> = list
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty() && !l.starts_with('#'))
        .collect();
    for (tool, pkg) in TOOLS {
        assert!(
            pkgs.contains(pkg),
            "deploy/ci-packages.txt lacks {pkg} (for {tool})"
        );
    }
}

// --- outside tools ----------------------------------------------------------

/// Copies the units into `dir`, with the binaries' path (`/usr/local/bin/`) replaced
/// by `dir/bin/`, where executable stand-ins exist: `systemd-analyze verify` checks
/// that ExecStart= names an executable. The template `tessera-worker@.service` is
/// verified as the instance `tessera-worker@1.service`, which also expands `%i`.
/// Returns the unit paths to verify.
fn stage_units(dir: &Path) -> Vec<PathBuf> {
    use std::os::unix::fs::PermissionsExt;
    let bin = dir.join("bin");
    std::fs::create_dir_all(&bin).unwrap();
    for b in ["tessera-server", "tessera-worker"] {
        let p = bin.join(b);
        std::fs::write(&p, "#!/bin/sh\nexit 0\n").unwrap();
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o755)).unwrap();
    }
    let mut out = Vec::new();
    for p in files_in("systemd", ".service") {
        let text = std::fs::read_to_string(&p).unwrap();
        assert!(
            text.contains("ExecStart=/usr/local/bin/tessera-"),
            "{}: the test expects ExecStart=/usr/local/bin/tessera-...; update stage_units if the path changes",
            rel_name(&p)
        );
        let staged = text.replace("/usr/local/bin/", &format!("{}/", bin.display()));
        let name = p
            .file_name()
            .unwrap()
            .to_str()
            .unwrap()
            .replace("@.service", "@1.service");
        let dest = dir.join(name);
        std::fs::write(&dest, staged).unwrap();
        out.push(dest);
    }
    out
}

/// `systemd-analyze verify`: fails on a non-zero exit and on any message, because
/// systemd reports a bad value ("Failed to parse ..., ignoring") as a warning only.
fn systemd_verify(unit: &Path) -> Result<(), String> {
    let out = Command::new("systemd-analyze")
        .args(["verify", "--man=no"])
        .arg(unit)
        .output()
        .map_err(|e| format!("cannot run systemd-analyze: {e}"))?;
    let msg = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    if !out.status.success() || !msg.trim().is_empty() {
        return Err(format!(
            "systemd-analyze verify {}: {}\n{}",
            unit.display(),
            out.status,
            msg.trim()
        ));
    }
    Ok(())
}

/// `systemd-analyze security --offline`: the exposure score must be at most 2.0
/// ("OK" on systemd's 0–10 scale; threshold given in tenths).
fn systemd_security(unit: &Path) -> Result<(), String> {
    let out = Command::new("systemd-analyze")
        .args(["security", "--offline=yes", "--threshold=20", "--no-pager"])
        .arg(unit)
        .output()
        .map_err(|e| format!("cannot run systemd-analyze: {e}"))?;
    if !out.status.success() {
        let text = String::from_utf8_lossy(&out.stdout);
        let score = text
            .lines()
            .rev()
            .find(|l| l.contains("Overall exposure"))
            .unwrap_or("")
            .to_string();
        return Err(format!(
            "{}: exposure above 2.0: {score}\n{}",
            unit.display(),
            String::from_utf8_lossy(&out.stderr)
        ));
    }
    Ok(())
}

fn shellcheck(file: &Path) -> Result<(), String> {
    let out = Command::new("shellcheck")
        .args(["--shell=bash", "--severity=info"])
        .arg(file)
        .output()
        .map_err(|e| format!("cannot run shellcheck: {e}"))?;
    if !out.status.success() {
        return Err(format!(
            "shellcheck {}:\n{}",
            file.display(),
            String::from_utf8_lossy(&out.stdout)
        ));
    }
    Ok(())
}

#[test]
fn systemd_analyze_verifies_the_units() {
    require_tool("systemd-analyze");
    let tmp = tempfile::tempdir().unwrap();
    let units = stage_units(tmp.path());
    let errors: Vec<String> = units
        .iter()
        .filter_map(|u| systemd_verify(u).err())
        .collect();
    assert_no_errors("systemd-analyze verify", &errors);
    let errors: Vec<String> = units
        .iter()
        .filter_map(|u| systemd_security(u).err())
        .collect();
    assert_no_errors("systemd-analyze security", &errors);
}

#[test]
fn shellcheck_passes_the_scripts() {
    require_tool("shellcheck");
    let mut scripts = files_in("slurm", ".sbatch");
    for dir in ["slurm", "systemd", "kubernetes", "container", ""] {
        scripts.extend(files_in(dir, ".sh"));
    }
    assert!(!scripts.is_empty());
    let errors: Vec<String> = scripts.iter().filter_map(|s| shellcheck(s).err()).collect();
    assert_no_errors("shellcheck", &errors);
}

// --- the Slurm script's signal forwarding, with a stand-in worker ---------------

/// A stand-in for tessera-worker: logs its arguments and environment, and on
/// SIGTERM logs "term", takes a second as if finishing a cell, logs "done", exits 0.
const FAKE_WORKER: &str = r#"#!/bin/bash
log="$FAKE_LOG"
echo "start $* server=$TESSERA_SERVER token=$TESSERA_TOKEN threads=$TESSERA_THREADS" >> "$log"
trap 'echo term >> "$log"; sleep 1; echo done >> "$log"; exit 0' TERM
while :; do sleep 0.05; done
"#;

fn fake_worker(dir: &Path) -> PathBuf {
    use std::os::unix::fs::PermissionsExt;
    let p = dir.join("fake-worker");
    std::fs::write(&p, FAKE_WORKER).unwrap();
    std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o755)).unwrap();
    p
}

fn sbatch_command(dir: &Path) -> Command {
    let mut cmd = Command::new("bash");
    cmd.arg(deploy(SBATCH))
        .env_clear()
        .env("PATH", std::env::var("PATH").unwrap_or_default())
        .env("HOME", dir)
        .env("WORKER_BIN", fake_worker(dir))
        .env("FAKE_LOG", dir.join("log"))
        .current_dir(dir);
    cmd
}

fn wait_for(path: &Path, needle: &str) -> String {
    for _ in 0..200 {
        let text = std::fs::read_to_string(path).unwrap_or_default();
        if text.contains(needle) {
            return text;
        }
        std::thread::sleep(std::time::Duration::from_millis(25));
    }
    panic!("{} never contained {needle:?}", path.display());
}

fn wait_exit(child: &mut std::process::Child) -> std::process::ExitStatus {
    for _ in 0..400 {
        if let Some(s) = child.try_wait().unwrap() {
            return s;
        }
        std::thread::sleep(std::time::Duration::from_millis(25));
    }
    let _ = child.kill();
    panic!("the Slurm script did not exit within 10 s");
}

#[test]
fn slurm_script_forwards_sigterm_and_waits_for_the_worker() {
    let tmp = tempfile::tempdir().unwrap();
    let mut child = sbatch_command(tmp.path())
        .env("TESSERA_SERVER", "http://server.example:8470")
        .env("TESSERA_TOKEN", "placeholder-token")
        .env("SLURM_CPUS_PER_TASK", "4")
        .stdout(std::process::Stdio::null())
        .spawn()
        .expect("bash");
    let log = tmp.path().join("log");
    let started = wait_for(&log, "start");
    assert!(
        started.contains(
            "start run server=http://server.example:8470 token=placeholder-token threads=4"
        ),
        "worker started as {started:?}"
    );
    let killed = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(killed.success());
    let status = wait_exit(&mut child);
    let text = std::fs::read_to_string(&log).unwrap();
    // The script exits only after the worker finished: "done" is logged before it returns.
    assert!(text.contains("term\ndone\n"), "worker log: {text:?}");
    assert_eq!(
        status.code(),
        Some(0),
        "the script must exit with the worker's status 0"
    );
}

#[test]
fn slurm_script_refuses_a_token_file_others_can_read() {
    use std::os::unix::fs::PermissionsExt;
    let tmp = tempfile::tempdir().unwrap();
    let env_file = tmp.path().join("worker.env");
    std::fs::write(&env_file, "TESSERA_SERVER=http://s:8470\nTESSERA_TOKEN=t\n").unwrap();
    std::fs::set_permissions(&env_file, std::fs::Permissions::from_mode(0o644)).unwrap();
    let out = sbatch_command(tmp.path())
        .env("WORKER_ENV_FILE", &env_file)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("readable by others"), "stderr: {err}");
    assert!(
        !tmp.path().join("log").exists(),
        "the worker must not start"
    );

    // Mode 0600: the settings are read and the worker starts with them.
    std::fs::set_permissions(&env_file, std::fs::Permissions::from_mode(0o600)).unwrap();
    let mut child = sbatch_command(tmp.path())
        .env("WORKER_ENV_FILE", &env_file)
        .stdout(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let started = wait_for(&tmp.path().join("log"), "start");
    assert!(
        started.contains("server=http://s:8470 token=t threads=1"),
        "worker started as {started:?}"
    );
    Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert_eq!(wait_exit(&mut child).code(), Some(0));
}

// ---------------------------------------------------------------------------
// Tests: each check fails on a broken copy.
// ---------------------------------------------------------------------------

fn invocation(program: &str, args: &[&str], env: &[&str]) -> Invocation {
    Invocation {
        source: "sample".into(),
        program: program.into(),
        args: args.iter().map(|s| s.to_string()).collect(),
        env: env.iter().map(|s| (s.to_string(), None)).collect(),
    }
}

#[test]
fn invocation_check_rejects_unknown_flags_env_and_tokens_on_the_command_line() {
    let ok = invocation(
        "tessera-server",
        &["serve", "--listen", "0.0.0.0:1", "--db", "/x"],
        &["RUST_LOG"],
    );
    assert_no_errors("good sample", &check_invocation(&ok));
    let ok = invocation(
        "tessera-worker",
        &["run", "--threads=2"],
        &["TESSERA_SERVER", "TESSERA_TOKEN"],
    );
    assert_no_errors("good sample", &check_invocation(&ok));

    let e = check_invocation(&invocation(
        "tessera-server",
        &["serve", "--listn", "a:1", "--db", "/x"],
        &[],
    ));
    assert_has_error(&e, "no flag '--listn'");
    let e = check_invocation(&invocation(
        "tessera-server",
        &["serve", "--db", "/x"],
        &["TESSERA_LISTEN", "TESSERA_DBB"],
    ));
    assert_has_error(&e, "no environment variable 'TESSERA_DBB'");
    let e = check_invocation(&invocation(
        "tessera-worker",
        &["run", "--token", "abc", "--server", "u"],
        &[],
    ));
    assert_has_error(&e, "token is on the command line");
    let e = check_invocation(&invocation(
        "tessera-worker",
        &["run"],
        &["TESSERA_TOKEN", "TESSERA_LISTEN"],
    ));
    assert_has_error(&e, "reads no environment variable 'TESSERA_LISTEN'");
    assert_has_error(&e, "neither --server nor TESSERA_SERVER");
    let e = check_invocation(&invocation(
        "tessera-worker",
        &["serve"],
        &["TESSERA_SERVER", "TESSERA_TOKEN"],
    ));
    assert_has_error(&e, "found subcommand");
    let e = check_invocation(&invocation(
        "tessera-server",
        &["serve", "--listen", "--db", "/x"],
        &[],
    ));
    assert_has_error(&e, "'--listen' has no value");
    let e = check_invocation(&invocation("tessera-srv", &["serve"], &[]));
    assert_has_error(&e, "unknown program");
}

#[test]
fn unit_checks_reject_a_broken_unit() {
    let text = read("systemd/tessera-server.service");
    let example = read(ENV_EXAMPLE);
    let broken = text.replace("--listen ${TESSERA_LISTEN}", "--listen ${TESSERA_LISTN}");
    assert_has_error(&check_unit("u", &broken), "${TESSERA_LISTN}");
    let broken = text.replace("ProtectSystem=strict", "ProtectSystem=full");
    assert_has_error(&check_unit("u", &broken), "ProtectSystem= must be strict");
    let broken = text.replace("--db ${TESSERA_DB}", "--database ${TESSERA_DB}");
    let inv = unit_invocation("u", &broken, &example).unwrap();
    assert_has_error(&check_invocation(&inv), "no flag '--database'");
    let broken = text.replace(
        "Environment=RUST_LOG=info",
        "Environment=RUST_LOG=info TESSERA_PORT=1",
    );
    let inv = unit_invocation("u", &broken, &example).unwrap();
    assert_has_error(&check_invocation(&inv), "'TESSERA_PORT'");
}

/// Applies `edit` to a copy of the shipped manifests and returns the check's errors.
fn kube_errors_after(edit: impl FnOnce(&mut Vec<Doc>)) -> Vec<String> {
    let mut docs = kubernetes_docs();
    edit(&mut docs);
    check_kubernetes(&docs)
}

fn doc_mut<'a>(docs: &'a mut [Doc], k: &str, n: &str) -> &'a mut Value {
    &mut docs
        .iter_mut()
        .find(|d| kind(d) == k && name(d) == n)
        .unwrap_or_else(|| panic!("no {k} {n}"))
        .value
}

fn container_mut(v: &mut Value, index: usize) -> &mut Value {
    &mut v["spec"]["template"]["spec"]["containers"][index]
}

#[test]
fn kubernetes_checks_reject_broken_manifests() {
    let yaml = |s: &str| -> Value { serde_norway::from_str(s).unwrap() };
    let e = kube_errors_after(|d| {
        container_mut(doc_mut(d, "StatefulSet", "tessera-server"), 0)["readinessProbe"]
            ["httpGet"]["path"] = yaml("/ready");
    });
    assert_has_error(&e, "readinessProbe must be httpGet on /healthz");
    let e = kube_errors_after(|d| {
        container_mut(doc_mut(d, "StatefulSet", "tessera-server"), 0)["livenessProbe"] =
            Value::Null;
    });
    assert_has_error(&e, "must be httpGet on /healthz");
    let e = kube_errors_after(|d| {
        let env = &mut container_mut(doc_mut(d, "Deployment", "tessera-worker"), 0)["env"];
        for item in env.as_sequence_mut().unwrap() {
            if item["name"] == yaml("TESSERA_TOKEN") {
                item["valueFrom"]["secretKeyRef"]["key"] = yaml("worker_token");
            }
        }
    });
    assert_has_error(
        &e,
        "key worker_token, which deploy/kubernetes/secret.example.yaml does not define",
    );
    let e = kube_errors_after(|d| {
        doc_mut(d, "HorizontalPodAutoscaler", "tessera-worker")["spec"]["scaleTargetRef"]["name"] =
            yaml("tessera-workers");
    });
    assert_has_error(
        &e,
        "scaleTargetRef must be apps/v1 Deployment of the workers",
    );
    let e = kube_errors_after(|d| {
        doc_mut(d, "Service", "tessera-server")["spec"]["selector"]
            ["app.kubernetes.io/component"] = yaml("srv");
    });
    assert_has_error(&e, "does not select the StatefulSet's pod labels");
    let e = kube_errors_after(|d| {
        doc_mut(d, "Service", "tessera-server")["spec"]["selector"] =
            yaml("{app.kubernetes.io/name: tessera}");
    });
    assert_has_error(&e, "also selects the pods of 'tessera-worker'");
    let e = kube_errors_after(|d| {
        doc_mut(d, "StatefulSet", "tessera-server")["spec"]["template"]["metadata"]
            ["annotations"]["prometheus.io/scrape"] = Value::Bool(true);
    });
    assert_has_error(&e, "must be a string");
    let e = kube_errors_after(|d| {
        let env = &mut container_mut(doc_mut(d, "Deployment", "tessera-worker"), 0)["env"];
        env.as_sequence_mut()
            .unwrap()
            .push(yaml("{name: TESSERA_WORKERS, value: '3'}"));
    });
    assert_has_error(&e, "reads no environment variable 'TESSERA_WORKERS'");
    let e = kube_errors_after(|d| {
        doc_mut(d, "StatefulSet", "tessera-server")["spec"]["replicas"] = yaml("2");
    });
    assert_has_error(&e, "spec.replicas must be 1");
    let e = kube_errors_after(|d| {
        doc_mut(d, "HorizontalPodAutoscaler", "tessera-worker")["apiVersion"] =
            yaml("autoscaling/v2beta2");
    });
    assert_has_error(
        &e,
        "unknown apiVersion/kind autoscaling/v2beta2/HorizontalPodAutoscaler",
    );
    let e = kube_errors_after(|d| {
        container_mut(doc_mut(d, "StatefulSet", "tessera-server"), 0)["args"] =
            yaml("['--listen', '0.0.0.0:9000', '--db', '/var/lib/tessera/tessera.sqlite']");
    });
    assert_has_error(&e, "must equal the --listen port");
    let e = kube_errors_after(|d| {
        container_mut(doc_mut(d, "StatefulSet", "tessera-server"), 0)["args"] =
            yaml("['--listen', '0.0.0.0:8470', '--db', '/data/tessera.sqlite']");
    });
    assert_has_error(&e, "is not a mount of a volumeClaimTemplate");
    let e = kube_errors_after(|d| {
        let s = d.iter_mut().find(|d| kind(d) == "Secret").unwrap();
        s.value["stringData"]["worker-token"] = yaml("abc123");
    });
    assert_has_error(&e, "must be a placeholder");
    let e = kube_errors_after(|d| {
        container_mut(doc_mut(d, "Deployment", "tessera-worker"), 0)["resources"]["requests"] =
            Value::Null;
    });
    assert_has_error(&e, "lacks resources.requests.cpu");
    let e = kube_errors_after(|d| {
        let env = &mut container_mut(doc_mut(d, "Deployment", "tessera-worker"), 0)["env"];
        env.as_sequence_mut().unwrap()[0]["value"] = yaml("http://tessera:8470");
    });
    assert_has_error(&e, "is not a Service name and port");
    // A YAML syntax error is reported with the file.
    let err = load_yaml("bad.yaml", "kind: Service\n  metadata: [\n")
        .err()
        .expect("a parse error");
    assert!(err.starts_with("bad.yaml"), "{err}");
}

#[test]
fn sbatch_checks_reject_a_broken_script() {
    let text = read(SBATCH);
    let (e, _) = check_sbatch(
        "s",
        &text.replace("#SBATCH --signal=B:TERM@300", "#SBATCH --signal=TERM@300"),
    );
    assert_has_error(&e, "must start with B:");
    let (e, _) = check_sbatch("s", &text.replace("#SBATCH --signal=B:TERM@300\n", ""));
    assert_has_error(&e, "lacks #SBATCH --signal=");
    let (e, _) = check_sbatch("s", &text.replace("--time=10:00:00", "--time=4"));
    assert_has_error(&e, "is not below the time limit");
    let (e, _) = check_sbatch("s", &text.replace("trap forward_stop TERM INT", ""));
    assert_has_error(&e, "no `trap ... TERM`");
    let inv = sbatch_invocation(
        "s",
        &text.replace("export TESSERA_SERVER", "export TESSERA_URL TESSERA_SERVER"),
    )
    .unwrap();
    assert_has_error(&check_invocation(&inv), "'TESSERA_URL'");
    assert_eq!(slurm_seconds("10:00:00"), Some(36000));
    assert_eq!(slurm_seconds("1-00:00:00"), Some(86400));
    assert_eq!(slurm_seconds("90"), Some(5400));
}

#[test]
fn systemd_analyze_rejects_broken_units() {
    require_tool("systemd-analyze");
    let tmp = tempfile::tempdir().unwrap();
    let units = stage_units(tmp.path());
    let server = units
        .iter()
        .find(|u| u.ends_with("tessera-server.service"))
        .unwrap();
    let good = std::fs::read_to_string(server).unwrap();
    // A bad value is only a warning to systemd; our wrapper must still fail.
    for (from, to) in [
        ("\nProtectSystem=strict", "\nProtectSystem=stritc"),
        ("\nRestart=on-failure", "\nRestart=sometimes"),
        ("\nExecStart=", "\nExecStrat="),
    ] {
        assert!(good.contains(from), "the unit has no {from:?} to break");
        let broken = tmp.path().join("broken.service");
        std::fs::write(&broken, good.replacen(from, to, 1)).unwrap();
        assert!(
            systemd_verify(&broken).is_err(),
            "systemd-analyze verify accepted {to}"
        );
    }
    // Stripping the hardening raises the exposure score above the threshold.
    let weak: String = good
        .lines()
        .filter(|l| {
            ![
                "Protect",
                "Private",
                "Restrict",
                "NoNewPrivileges",
                "SystemCall",
                "Capability",
                "MemoryDeny",
                "LockPersonality",
                "UMask",
                "ProcSubset",
                "RemoveIPC",
            ]
            .iter()
            .any(|p| l.starts_with(p))
        })
        .collect::<Vec<_>>()
        .join("\n");
    let weak_path = tmp.path().join("weak.service");
    std::fs::write(&weak_path, weak).unwrap();
    assert!(systemd_verify(&weak_path).is_ok());
    assert!(
        systemd_security(&weak_path).is_err(),
        "an unhardened unit passed the exposure threshold"
    );
}

#[test]
fn shellcheck_rejects_a_broken_script() {
    require_tool("shellcheck");
    let tmp = tempfile::tempdir().unwrap();
    let p = tmp.path().join("broken.sbatch");
    std::fs::write(&p, "#!/bin/bash\ndir=$1\nrm -rf $dir/*\n").unwrap();
    assert!(shellcheck(&p).is_err());
}

// ---------------------------------------------------------------------------
// Launch: the real binaries with the invocations above. Waits for the worker loop.
// ---------------------------------------------------------------------------

fn target_bin(name: &str) -> PathBuf {
    let target = std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| repo_root().join("target"));
    let p = target.join("debug").join(name);
    assert!(
        p.exists(),
        "{} is not built: run `cargo build -p tessera-server -p tessera-worker`",
        p.display()
    );
    p
}

/// Status line and body of `GET path` over HTTP/1.0 on loopback, or None if nobody answers.
fn http_get(port: u16, path: &str) -> Option<(String, String)> {
    use std::io::{Read, Write};
    let mut s = std::net::TcpStream::connect(("127.0.0.1", port)).ok()?;
    s.set_read_timeout(Some(std::time::Duration::from_secs(5)))
        .ok()?;
    write!(s, "GET {path} HTTP/1.0\r\nHost: 127.0.0.1\r\n\r\n").ok()?;
    let mut resp = String::new();
    s.read_to_string(&mut resp).ok()?;
    let (head, body) = resp.split_once("\r\n\r\n").unwrap_or((&resp, ""));
    Some((
        head.lines().next().unwrap_or("").to_string(),
        body.to_string(),
    ))
}

/// Replaces `${NAME}` with values from `vars`.
fn expand(word: &str, vars: &BTreeMap<String, String>) -> String {
    let mut out = word.to_string();
    for (k, v) in vars {
        out = out.replace(&format!("${{{k}}}"), v);
    }
    out
}

/// Starts tessera-server and tessera-worker exactly as the systemd units do (the
/// unit's ExecStart= words and environment; only the listen address and database
/// path are moved to loopback and a temp dir), checks /healthz and /metrics, then
/// stops the worker with SIGTERM and expects exit 0.
#[test]
fn deployed_command_lines_start_a_real_server_and_worker() {
    let _slow = tessera_tests::slow_test();
    let tmp = tempfile::tempdir().unwrap();
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let db = tmp.path().join("tessera.sqlite").display().to_string();
    let invs = systemd_invocations();
    let server_inv = invs.iter().find(|i| i.program == "tessera-server").unwrap();
    let worker_inv = invs.iter().find(|i| i.program == "tessera-worker").unwrap();

    let mut vars: BTreeMap<String, String> = server_inv
        .env
        .iter()
        .filter_map(|(k, v)| v.clone().map(|v| (k.clone(), v)))
        .collect();
    vars.insert("TESSERA_LISTEN".into(), format!("127.0.0.1:{port}"));
    vars.insert("TESSERA_DB".into(), db.clone());
    let mut server = Command::new(target_bin("tessera-server"))
        .args(server_inv.args.iter().map(|a| expand(a, &vars)))
        .envs(&vars)
        .spawn()
        .unwrap();
    let mut ready = false;
    for _ in 0..100 {
        if http_get(port, "/healthz").is_some_and(|(status, _)| status.contains(" 200")) {
            ready = true;
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(100));
    }
    let metrics = http_get(port, "/metrics");
    let token = Command::new(target_bin("tessera-server"))
        .args(["token", "create", "--role", "worker", "--db", &db])
        .output()
        .unwrap();
    let token = String::from_utf8_lossy(&token.stdout)
        .lines()
        .rev()
        .find(|l| !l.trim().is_empty())
        .unwrap_or("")
        .trim()
        .to_string();

    let mut wvars: BTreeMap<String, String> = worker_inv
        .env
        .iter()
        .filter_map(|(k, v)| v.clone().map(|v| (k.clone(), v)))
        .collect();
    wvars.insert("TESSERA_SERVER".into(), format!("http://127.0.0.1:{port}"));
    wvars.insert("TESSERA_TOKEN".into(), token.clone());
    let mut worker = Command::new(target_bin("tessera-worker"))
        .args(worker_inv.args.iter().map(|a| expand(a, &wvars)))
        .env_clear()
        .env("PATH", std::env::var("PATH").unwrap_or_default())
        .envs(&wvars)
        .spawn()
        .unwrap();
    // Give the worker time to install its signal handlers even on a loaded machine: a
    // SIGTERM before that would end it by the default action, not by a graceful stop.
    std::thread::sleep(std::time::Duration::from_secs(3));
    let alive = worker.try_wait().unwrap().is_none();
    Command::new("kill")
        .args(["-TERM", &worker.id().to_string()])
        .status()
        .unwrap();
    let worker_status = wait_exit(&mut worker);
    let _ = server.kill();
    let _ = server.wait();

    assert!(ready, "server never answered 200 on /healthz");
    let (status, body) = metrics.expect("no answer on /metrics");
    assert!(
        status.contains(" 200") && body.contains("# TYPE"),
        "/metrics is not Prometheus text: {status} {body:.200}"
    );
    assert!(!token.is_empty(), "token create printed no token");
    assert!(alive, "the worker exited before SIGTERM");
    assert_eq!(
        worker_status.code(),
        Some(0),
        "the worker must exit 0 after SIGTERM"
    );
}

// ---------------------------------------------------------------------------
// Field names and types against the official Kubernetes client's models.
// ---------------------------------------------------------------------------

/// Runs tests/reference/check_k8s_fields.py on `files`; returns its exit code and
/// report. A missing Python package fails the test with the install command.
fn k8s_client_check(files: &[PathBuf]) -> (i32, serde_json::Value) {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("reference/check_k8s_fields.py");
    let out = Command::new("python3")
        .arg(&script)
        .args(files)
        .output()
        .unwrap_or_else(|e| panic!("cannot run python3: {e}"));
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap_or_else(|e| {
        panic!(
            "{} printed no JSON ({e}):\n{}\n{}",
            script.display(),
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        )
    });
    if let Some(missing) = report.get("missing") {
        panic!(
            "Python package missing ({missing}): run `python3 -m pip install -r tests/requirements.txt` \
             (the Kubernetes check needs the `kubernetes` client)"
        );
    }
    (out.status.code().unwrap_or(-1), report)
}

fn report_errors(report: &serde_json::Value) -> Vec<String> {
    report["errors"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|e| e.as_str().unwrap_or("?").to_string())
                .collect()
        })
        .unwrap_or_default()
}

#[test]
fn kubernetes_fields_match_the_official_client_models() {
    let files = files_in("kubernetes", ".yaml");
    let (code, report) = k8s_client_check(&files);
    assert_no_errors("kubernetes client models", &report_errors(&report));
    assert_eq!(code, 0);
    // Everything but the kustomization was compared with a model.
    let checked = report["checked"].as_array().map(Vec::len).unwrap_or(0);
    let docs = kubernetes_docs()
        .iter()
        .filter(|d| kind(d) != "Kustomization")
        .count();
    assert_eq!(checked, docs, "report: {report:#}");
}

#[test]
fn kubernetes_client_check_rejects_wrong_fields_and_types() {
    let tmp = tempfile::tempdir().unwrap();
    let server = read("kubernetes/server.yaml");
    let cases = [
        (
            server.replace("readinessProbe:", "readinessProbes:"),
            "has no field 'readinessProbes'",
        ),
        (
            server.replace("replicas: 1", "replicas: \"1\""),
            "spec.replicas: expected an integer",
        ),
        (
            server.replace("cpu: \"2\"", "cpu: [2]"),
            "limits.cpu: expected a string",
        ),
        (
            server.replace("        - name: server\n", "        - image2: x\n"),
            "has no field 'image2'",
        ),
        (
            server.replace("        - name: server\n", "        -\n"),
            "rejected by kubernetes.client.V1StatefulSet",
        ),
    ];
    // One run for all cases (importing the client takes seconds); each error names its file.
    let mut files = Vec::new();
    for (i, (text, _)) in cases.iter().enumerate() {
        assert_ne!(text, &server, "case {i} changed nothing");
        let p = tmp.path().join(format!("case{i}.yaml"));
        std::fs::write(&p, text).unwrap();
        files.push(p);
    }
    let (code, report) = k8s_client_check(&files);
    assert_eq!(code, 1, "{report:#}");
    let errors = report_errors(&report);
    for (i, (_, needle)) in cases.iter().enumerate() {
        let file = format!("case{i}.yaml#");
        let hits: Vec<&String> = errors.iter().filter(|e| e.contains(&file)).collect();
        assert!(
            hits.iter().any(|e| e.contains(needle)),
            "case {i}: expected an error containing {needle:?}, got {hits:#?}"
        );
    }
}
