//! Finds the outside programs that some integration tests run, so that a test whose program is missing shows
//! as *ignored* (with the reason) in the test summary instead of passing without having checked anything.
//!
//! | program            | env variable       | cfg set when found     | tests (tests/it/) |
//! |--------------------|--------------------|------------------------|-------------------|
//! | `promtool`         | `PROMTOOL`         | `has_promtool`         | alerting, daemon  |
//! | `prometheus`       | `PROMETHEUS`       | `has_prometheus`       | alerting          |
//! | `systemd-analyze`  | `SYSTEMD_ANALYZE`  | `has_systemd_analyze`  | alerting          |
//! | `systemd-tmpfiles` | `SYSTEMD_TMPFILES` | `has_systemd_tmpfiles` | alerting          |
//! | `chromium`         | `CHROMIUM`         | `has_chromium`         | ux (review page)  |
//!
//! Each is looked up in its env variable (which must then name an executable file), then in
//! `.ci/root/usr/bin`, then on `PATH`.
//!
//! The path found is passed to the tests as the compile-time env `LABELWEIR_TOOL_<ENV NAME>` (empty when
//! missing). Under CI (env `CI` = `true`, `1` or `yes`) the cfg `labelweir_ci` is set and no such test is
//! ignored: a missing program makes the test fail. `.ci/run` installs all five and exports their paths.
//!
//! `.ci/root/usr/bin` is where `.ci/run` unpacks Debian's prometheus package, so a developer who ran it once
//! has those tests too. The script runs again when any of these variables (or `PATH`, or `CI`) changes, or
//! anything under `.ci/`; after installing a program elsewhere on an unchanged `PATH`, `touch build.rs` (or set
//! the variable) so that the tests see it.

use std::path::{Path, PathBuf};

/// (program, env variable naming it, cfg set when found)
const TOOLS: [(&str, &str, &str); 5] = [
    ("promtool", "PROMTOOL", "has_promtool"),
    ("prometheus", "PROMETHEUS", "has_prometheus"),
    ("systemd-analyze", "SYSTEMD_ANALYZE", "has_systemd_analyze"),
    (
        "systemd-tmpfiles",
        "SYSTEMD_TMPFILES",
        "has_systemd_tmpfiles",
    ),
    ("chromium", "CHROMIUM", "has_chromium"),
];

fn main() {
    println!("cargo::rerun-if-changed=build.rs");
    println!("cargo::rerun-if-env-changed=PATH");
    println!("cargo::rerun-if-env-changed=CI");
    println!("cargo::rerun-if-changed=.ci");
    println!("cargo::rustc-check-cfg=cfg(labelweir_ci)");
    if on_ci() {
        println!("cargo::rustc-cfg=labelweir_ci");
    }
    for (name, var, cfg) in TOOLS {
        println!("cargo::rerun-if-env-changed={var}");
        println!("cargo::rustc-check-cfg=cfg({cfg})");
        let found = find(name, var);
        if let Some(p) = &found {
            println!("cargo::rustc-cfg={cfg}");
            // Run again if the program goes away or is replaced (only watched where it exists: a missing
            // watched path would make every build run this script again).
            println!("cargo::rerun-if-changed={}", p.display());
        }
        println!(
            "cargo::rustc-env=LABELWEIR_TOOL_{}={}",
            var,
            found
                .as_deref()
                .map(Path::to_string_lossy)
                .unwrap_or_default()
        );
    }
}

/// `CI` names a CI run when it is `true`, `1` or `yes` (any case); `false`, `0`, empty or unset do not.
fn on_ci() -> bool {
    std::env::var("CI").is_ok_and(|v| {
        let v = v.trim().to_ascii_lowercase();
        v == "true" || v == "1" || v == "yes"
    })
}

/// The program named by env `var` (which must then exist), else `.ci/root/usr/bin/<name>` (the unpacked
/// Debian packages of `.ci/run`), else the first executable `name` on `PATH`.
fn find(name: &str, var: &str) -> Option<PathBuf> {
    if let Some(p) = std::env::var_os(var).filter(|v| !v.is_empty()) {
        let p = PathBuf::from(p);
        assert!(
            is_executable(&p),
            "{var}={} is not an executable file",
            p.display()
        );
        return Some(p);
    }
    let root = PathBuf::from(std::env::var_os("CARGO_MANIFEST_DIR")?);
    let unpacked = root.join(".ci/root/usr/bin").join(name);
    if is_executable(&unpacked) {
        return Some(unpacked);
    }
    let path = std::env::var_os("PATH")?;
    std::env::split_paths(&path)
        .map(|d| d.join(name))
        .find(|p| is_executable(p))
}

fn is_executable(p: &Path) -> bool {
    use std::os::unix::fs::PermissionsExt;
    std::fs::metadata(p).is_ok_and(|m| m.is_file() && m.permissions().mode() & 0o111 != 0)
}
