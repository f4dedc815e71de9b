//! Cluster job arrays: the recipe that runs one null, injection or noise-estimation campaign as
//! a SLURM job array (one shard per array task) plus a merge job that waits for every task
//! (docs/cluster.md).
//!
//! The recipe is three shell scripts in one folder, written as one output set:
//! - `array.sh`: one array task; it runs shard `SLURM_ARRAY_TASK_ID / SLURM_ARRAY_TASK_COUNT`
//!   of the campaign into `shards/shard-I`. It is requeueable: a task that was killed and
//!   requeued runs the same command again, which skips a finished shard and resumes a null
//!   shard from its checkpoints (`.partial/`, null/mod.rs).
//! - `merge.sh`: the campaign's own merge of every shard folder into the final folder.
//! - `submit.sh`: `sbatch` of the array, then `sbatch --dependency=afterok:ARRAY` of the merge.
//!
//! Because every trial, realization and pulsar draws from `rng::stream(seed, purpose, index)`
//! alone, the merged folder holds the same numbers as one process running the whole campaign.
//! The scheduler does the scheduling; nothing here starts processes.

use crate::error::{Error, Result};
use crate::output::OutputSet;
use crate::shard::MAX_SHARDS;
use serde::Serialize;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// Which campaign the array runs.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum CampaignKind {
    /// `ptacorr null` shards, merged by `ptacorr merge`.
    Null,
    /// `ptacorr inject` shards, merged by `ptacorr inject --merge`.
    Inject,
    /// `ptacorr noise` shards (over pulsars), merged by `ptacorr merge-noise`.
    Noise,
}

impl CampaignKind {
    /// The subcommand name.
    pub fn name(self) -> &'static str {
        match self {
            CampaignKind::Null => "null",
            CampaignKind::Inject => "inject",
            CampaignKind::Noise => "noise",
        }
    }
}

/// Options the recipe takes itself; the campaign's arguments may not set them.
pub const RESERVED_OPTIONS: [&str; 3] = ["--out", "--shard", "--merge"];

/// Everything a job-array recipe is made of (recorded in `recipe.json`).
#[derive(Clone, Debug, Serialize)]
pub struct ArrayRecipe {
    pub kind: CampaignKind,
    /// Array tasks = shards.
    pub tasks: u64,
    /// The `ptacorr` program the tasks run (absolute).
    pub program: PathBuf,
    /// Working folder of every job (absolute); relative paths in `args` are relative to it.
    pub workdir: PathBuf,
    /// The recipe folder (absolute): scripts, `shards/`, `logs/`.
    pub recipe_dir: PathBuf,
    /// The merged result folder (absolute).
    pub out: PathBuf,
    /// The campaign's arguments after the subcommand, without --out/--shard.
    pub args: Vec<String>,
    pub job_name: String,
    /// `--time` of each array task (SLURM's syntax, e.g. `02:00:00`), if any.
    pub time: Option<String>,
    pub cpus_per_task: u32,
    pub partition: Option<String>,
}

/// Quote a word for bash: inside single quotes, with `'` written as `'\''`.
pub fn shell_quote(s: &str) -> String {
    format!("'{}'", s.replace('\'', r"'\''"))
}

fn check_word(name: &str, value: &str) -> Result<()> {
    let ok = !value.is_empty()
        && value.len() <= 64
        && value
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || "._-:+".contains(c));
    if ok {
        Ok(())
    } else {
        Err(Error::setting(
            name,
            format!(
                "1 to 64 characters from letters, digits, '.', '_', '-', ':', '+', got {}",
                crate::output::quote(value)
            ),
        ))
    }
}

impl ArrayRecipe {
    /// Check the settings before anything is written.
    pub fn validate(&self) -> Result<()> {
        if self.tasks == 0 || self.tasks > MAX_SHARDS {
            return Err(Error::setting(
                "tasks",
                format!("must be in 1..={MAX_SHARDS}, got {}", self.tasks),
            ));
        }
        if self.cpus_per_task == 0 || self.cpus_per_task > 4096 {
            return Err(Error::setting(
                "cpus-per-task",
                format!("must be in 1..=4096, got {}", self.cpus_per_task),
            ));
        }
        check_word("job-name", &self.job_name)?;
        if let Some(t) = &self.time {
            check_word("time", t)?;
        }
        if let Some(p) = &self.partition {
            check_word("partition", p)?;
        }
        for a in &self.args {
            let opt = a.split('=').next().unwrap_or("");
            if RESERVED_OPTIONS.contains(&opt) {
                return Err(Error::setting(
                    "campaign arguments",
                    format!(
                        "{opt} is set by the recipe (each task writes its own shard folder; the merge job writes --out); leave it out"
                    ),
                ));
            }
            if a.contains('\n') || a.contains('\0') {
                return Err(Error::setting(
                    "campaign arguments",
                    "an argument holds a line break or a NUL character",
                ));
            }
        }
        for (name, p) in [
            ("program", &self.program),
            ("workdir", &self.workdir),
            ("recipe", &self.recipe_dir),
            ("out", &self.out),
        ] {
            if !p.is_absolute() {
                return Err(Error::setting(
                    name,
                    format!("must be an absolute path, got {}", p.display()),
                ));
            }
            if p.to_str().is_none_or(|s| s.contains('\n')) {
                return Err(Error::setting(
                    name,
                    format!("{} is not a plain UTF-8 path", p.display()),
                ));
            }
        }
        if self.out.starts_with(&self.recipe_dir) {
            return Err(Error::setting(
                "out",
                "the merged folder must lie outside the recipe folder",
            ));
        }
        Ok(())
    }

    fn q(p: &Path) -> String {
        shell_quote(&p.to_string_lossy())
    }

    /// The shard folder of task `$1` (a shell expression).
    fn shard_dir_expr(&self) -> String {
        format!("{}/shard-", Self::q(&self.recipe_dir.join("shards")))
    }

    /// `array.sh`: one array task.
    pub fn array_script(&self) -> String {
        let mut s = String::new();
        let _ = writeln!(s, "#!/bin/bash");
        let _ = writeln!(
            s,
            "# Written by `ptacorr job-array` (ptacorr {}): one shard of a {} campaign per task of",
            crate::VERSION,
            self.kind.name()
        );
        let _ = writeln!(
            s,
            "# a SLURM job array. Submit with submit.sh, which also queues the merge job."
        );
        let _ = writeln!(s, "#SBATCH --job-name={}", self.job_name);
        let _ = writeln!(s, "#SBATCH --array=1-{}", self.tasks);
        let _ = writeln!(s, "#SBATCH --requeue");
        let _ = writeln!(s, "#SBATCH --open-mode=append");
        let _ = writeln!(
            s,
            "#SBATCH --output={}/logs/shard-%a.log",
            self.recipe_dir.display()
        );
        let _ = writeln!(s, "#SBATCH --chdir={}", self.workdir.display());
        let _ = writeln!(s, "#SBATCH --cpus-per-task={}", self.cpus_per_task);
        if let Some(t) = &self.time {
            let _ = writeln!(s, "#SBATCH --time={t}");
        }
        if let Some(p) = &self.partition {
            let _ = writeln!(s, "#SBATCH --partition={p}");
        }
        s.push_str("set -euo pipefail\n");
        s.push_str(
            "if [ -z \"${SLURM_ARRAY_TASK_ID:-}\" ] || [ -z \"${SLURM_ARRAY_TASK_COUNT:-}\" ]; then\n  echo \"error: this script is one task of a SLURM job array; submit it with submit.sh\" >&2\n  exit 2\nfi\n",
        );
        let _ = writeln!(
            s,
            "if [ \"$SLURM_ARRAY_TASK_COUNT\" != {n} ] || [ \"$SLURM_ARRAY_TASK_ID\" -lt 1 ] || [ \"$SLURM_ARRAY_TASK_ID\" -gt {n} ]; then\n  echo \"error: this recipe has {n} shards (array tasks 1-{n}); got task $SLURM_ARRAY_TASK_ID of $SLURM_ARRAY_TASK_COUNT\" >&2\n  exit 2\nfi",
            n = self.tasks
        );
        s.push_str("shard=\"$SLURM_ARRAY_TASK_ID/$SLURM_ARRAY_TASK_COUNT\"\n");
        let _ = writeln!(s, "out={}\"$SLURM_ARRAY_TASK_ID\"", self.shard_dir_expr());
        s.push_str(
            "echo \"task $SLURM_ARRAY_TASK_ID of $SLURM_ARRAY_TASK_COUNT (job ${SLURM_ARRAY_JOB_ID:-?}, restart ${SLURM_RESTART_COUNT:-0}) on $(hostname)\"\n",
        );
        s.push_str("# Resume on requeue: a finished shard is kept as it is; a null shard that was stopped\n# resumes from its checkpoints in $out/.partial (the same command continues the same trials).\n");
        s.push_str("if [ -f \"$out/manifest.json\" ]; then\n  echo \"shard $shard is complete already ($out); nothing to do\"\n  exit 0\nfi\n");
        s.push_str("if [ -d \"$out/.partial\" ]; then\n  echo \"resuming shard $shard: $(find \"$out/.partial\" -name 'chunk-*.csv' | wc -l) finished chunks kept\"\nfi\n");
        let mut cmd = format!("{} {}", Self::q(&self.program), self.kind.name());
        for a in &self.args {
            cmd.push(' ');
            cmd.push_str(&shell_quote(a));
        }
        let _ = writeln!(s, "exec {cmd} --shard \"$shard\" --out \"$out\"");
        s
    }

    /// `merge.sh`: the merge job, run after every array task has succeeded.
    pub fn merge_script(&self) -> String {
        let mut s = String::new();
        let _ = writeln!(s, "#!/bin/bash");
        let _ = writeln!(
            s,
            "# Written by `ptacorr job-array` (ptacorr {}): merges the {} shards of the array into",
            crate::VERSION,
            self.tasks
        );
        let _ = writeln!(s, "# {}.", self.out.display());
        let _ = writeln!(s, "#SBATCH --job-name={}-merge", self.job_name);
        let _ = writeln!(
            s,
            "#SBATCH --output={}/logs/merge.log",
            self.recipe_dir.display()
        );
        let _ = writeln!(s, "#SBATCH --open-mode=append");
        let _ = writeln!(s, "#SBATCH --chdir={}", self.workdir.display());
        let _ = writeln!(s, "#SBATCH --requeue");
        if let Some(t) = &self.time {
            let _ = writeln!(s, "#SBATCH --time={t}");
        }
        if let Some(p) = &self.partition {
            let _ = writeln!(s, "#SBATCH --partition={p}");
        }
        s.push_str("set -euo pipefail\n");
        let flag = match self.kind {
            CampaignKind::Inject => "--merge ",
            CampaignKind::Null | CampaignKind::Noise => "",
        };
        let _ = writeln!(
            s,
            "dirs=()\nfor i in $(seq 1 {}); do\n  dirs+=({flag}{}\"$i\")\ndone",
            self.tasks,
            self.shard_dir_expr()
        );
        let merge = match self.kind {
            CampaignKind::Null => "merge",
            CampaignKind::Inject => "inject",
            CampaignKind::Noise => "merge-noise",
        };
        let _ = writeln!(
            s,
            "exec {} {merge} \"${{dirs[@]}}\" --out {}",
            Self::q(&self.program),
            Self::q(&self.out)
        );
        s
    }

    /// `submit.sh`: submit the array and the dependent merge job; extra arguments go to both
    /// `sbatch` calls (an account, a QOS, ...).
    pub fn submit_script(&self) -> String {
        let mut s = String::new();
        let _ = writeln!(s, "#!/bin/bash");
        let _ = writeln!(
            s,
            "# Written by `ptacorr job-array` (ptacorr {}). Usage: bash submit.sh [SBATCH OPTIONS...]",
            crate::VERSION
        );
        s.push_str("# Submits the job array, then the merge job, which runs once every task has succeeded.\n");
        s.push_str("set -euo pipefail\n");
        let _ = writeln!(s, "recipe={}", Self::q(&self.recipe_dir));
        s.push_str("mkdir -p \"$recipe/logs\" \"$recipe/shards\"\n");
        s.push_str("array=$(sbatch --parsable \"$@\" \"$recipe/array.sh\")\n");
        s.push_str("array=${array%%;*}\n");
        s.push_str("merge=$(sbatch --parsable \"$@\" --dependency=afterok:\"$array\" --kill-on-invalid-dep=yes \"$recipe/merge.sh\")\n");
        s.push_str("merge=${merge%%;*}\n");
        let _ = writeln!(
            s,
            "echo \"submitted array job $array ({} tasks) and merge job $merge; logs in $recipe/logs\"",
            self.tasks
        );
        s.push_str("echo \"array=$array merge=$merge\"\n");
        s
    }

    /// Write `array.sh`, `merge.sh`, `submit.sh` and `recipe.json` into the recipe folder as
    /// one output set, and make the scripts executable.
    pub fn write(&self) -> Result<()> {
        self.validate()?;
        let mut set = OutputSet::begin(&self.recipe_dir, "job-array")?;
        set.write("array.sh", self.array_script().as_bytes())?;
        set.write("merge.sh", self.merge_script().as_bytes())?;
        set.write("submit.sh", self.submit_script().as_bytes())?;
        set.write_json("recipe.json", self)?;
        set.commit()?;
        for name in ["array.sh", "merge.sh", "submit.sh"] {
            let p = self.recipe_dir.join(name);
            use std::os::unix::fs::PermissionsExt;
            std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o755))
                .map_err(|e| Error::io(&p, e))?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn recipe(kind: CampaignKind) -> ArrayRecipe {
        ArrayRecipe {
            kind,
            tasks: 4,
            program: "/opt/bin/ptacorr".into(),
            workdir: "/data/run".into(),
            recipe_dir: "/data/run/recipe".into(),
            out: "/data/run/result".into(),
            args: vec!["rel ease".into(), "--trials".into(), "it's".into()],
            job_name: "nulls".into(),
            time: Some("01:00:00".into()),
            cpus_per_task: 2,
            partition: None,
        }
    }

    #[test]
    fn quoting_survives_bash() {
        // Round trip through bash itself (the reference for its own quoting rules).
        let word = "a b'c\"$d`e\\";
        let o = std::process::Command::new("bash")
            .args(["-c", &format!("printf %s {}", shell_quote(word))])
            .output()
            .expect("bash");
        assert_eq!(String::from_utf8_lossy(&o.stdout), word);
    }

    #[test]
    fn scripts_name_the_shard_and_the_merge() {
        let r = recipe(CampaignKind::Inject);
        let a = r.array_script();
        assert!(a.contains("#SBATCH --array=1-4\n"));
        assert!(a.contains("#SBATCH --requeue\n"));
        assert!(a.contains("exec '/opt/bin/ptacorr' inject 'rel ease' '--trials' 'it'\\''s' --shard \"$shard\" --out \"$out\""));
        let m = r.merge_script();
        assert!(m.contains("dirs+=(--merge '/data/run/recipe/shards'/shard-\"$i\")"));
        assert!(m.contains("inject \"${dirs[@]}\" --out '/data/run/result'"));
        let n = recipe(CampaignKind::Null).merge_script();
        assert!(n.contains("'/opt/bin/ptacorr' merge \"${dirs[@]}\""));
        let s = r.submit_script();
        assert!(s.contains("--dependency=afterok:\"$array\""));
    }

    #[test]
    fn bad_settings_are_refused_before_writing() {
        let mut r = recipe(CampaignKind::Null);
        r.args.push("--shard=1/2".into());
        let e = r.validate().unwrap_err().to_string();
        assert!(e.contains("--shard is set by the recipe"), "{e}");
        let mut r = recipe(CampaignKind::Null);
        r.tasks = 0;
        assert!(r.validate().unwrap_err().to_string().contains("tasks"));
        let mut r = recipe(CampaignKind::Null);
        r.job_name = "a b".into();
        assert!(r.validate().unwrap_err().to_string().contains("job-name"));
        let mut r = recipe(CampaignKind::Null);
        r.out = "/data/run/recipe/out".into();
        assert!(r.validate().unwrap_err().to_string().contains("outside"));
        let mut r = recipe(CampaignKind::Null);
        r.workdir = "relative".into();
        assert!(r.validate().unwrap_err().to_string().contains("absolute"));
    }
}
