//! `ptacorr job-array` on a real scheduler: cli/tests/slurm/on-slurm.sh starts a single-node
//! SLURM (Debian's slurm-wlm with munge) with a private configuration, runs 4-task arrays of a
//! null and an injection campaign (one null task killed mid-run and requeued), and checks that
//! the merged folders are byte-identical to single-process runs. Ignored by default (it needs
//! root and the packages, and takes a few minutes); `./run test` and CI run it. When the
//! scheduler cannot start, the test fails with the daemons' logs.

use std::path::Path;
use std::process::Command;

#[test]
#[ignore = "starts a real SLURM (root, slurm-wlm and munge); ./run test runs it"]
fn job_arrays_on_a_real_slurm_match_one_process() {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap();
    let work = std::env::temp_dir().join(format!("ptacorr-slurm-{}", std::process::id()));
    let o = Command::new("bash")
        .arg(repo.join("cli/tests/slurm/on-slurm.sh"))
        .arg(env!("CARGO_BIN_EXE_ptacorr"))
        .arg(repo)
        .arg(&work)
        .output()
        .expect("bash runs");
    let stdout = String::from_utf8_lossy(&o.stdout);
    let stderr = String::from_utf8_lossy(&o.stderr);
    println!("{stdout}");
    assert!(
        o.status.success(),
        "the SLURM check failed:\n{stdout}\n{stderr}"
    );
    assert!(stdout.contains("all SLURM checks passed"), "{stdout}");
    std::fs::remove_dir_all(&work).ok();
}
