//! Records the git revision the binary is built from, for `understudy_build_info`.
//!
//! `UNDERSTUDY_GIT_REVISION` wins when set (a container build has no `.git`; pass it as a
//! build argument), else `git rev-parse --short=12 HEAD`, else "unknown" (a source tarball,
//! or no git installed). Cargo reruns this only when that variable, HEAD or the branch it
//! points to changes.

use std::path::Path;
use std::process::Command;

fn git(args: &[&str]) -> Option<String> {
    let out = Command::new("git").args(args).output().ok()?;
    if !out.status.success() {
        return None;
    }
    let text = String::from_utf8(out.stdout).ok()?.trim().to_owned();
    (!text.is_empty()).then_some(text)
}

fn main() {
    println!("cargo:rerun-if-env-changed=UNDERSTUDY_GIT_REVISION");
    let given = std::env::var("UNDERSTUDY_GIT_REVISION")
        .ok()
        .filter(|r| !r.trim().is_empty());
    let revision = match given {
        Some(revision) => revision,
        None => {
            // Rebuild when HEAD moves: a commit changes the branch's ref, a checkout HEAD.
            let mut watched = vec!["HEAD".to_owned(), "packed-refs".to_owned()];
            if let Some(branch) = git(&["symbolic-ref", "-q", "HEAD"]) {
                watched.push(branch);
            }
            for name in watched {
                if let Some(path) = git(&["rev-parse", "--git-path", &name]) {
                    if Path::new(&path).exists() {
                        println!("cargo:rerun-if-changed={path}");
                    }
                }
            }
            git(&["rev-parse", "--short=12", "HEAD"]).unwrap_or_else(|| "unknown".to_owned())
        }
    };
    println!("cargo:rustc-env=UNDERSTUDY_GIT_REVISION={revision}");
}
