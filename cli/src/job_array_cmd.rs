//! `ptacorr job-array`: write the SLURM job-array recipe of a null, inject or noise campaign
//! (argument handling only; the recipe comes from the engine's `cluster` module,
//! docs/cluster.md).

use anyhow::{Context, Result};
use clap::Parser;
use ptacorr::cluster::{ArrayRecipe, CampaignKind};
use std::path::PathBuf;

#[derive(Clone, Copy, clap::ValueEnum)]
pub enum KindArg {
    Null,
    Inject,
    Noise,
}

/// Arguments of `ptacorr job-array`.
#[derive(clap::Args)]
pub struct JobArrayArgs {
    /// The campaign: null, inject or noise.
    #[arg(value_enum)]
    kind: KindArg,
    /// Array tasks, one shard each.
    #[arg(long)]
    tasks: u64,
    /// Folder for the recipe (array.sh, merge.sh, submit.sh), the shard folders and the logs.
    #[arg(long)]
    recipe: PathBuf,
    /// Folder the merge job writes the merged campaign into.
    #[arg(long)]
    out: PathBuf,
    /// SLURM job name (the merge job is NAME-merge).
    #[arg(long, default_value = "ptacorr")]
    job_name: String,
    /// Time limit of each task, in SLURM's syntax (e.g. 02:00:00).
    #[arg(long)]
    time: Option<String>,
    /// CPUs of each task (the engine's threads use what the task is given).
    #[arg(long, default_value_t = 1)]
    cpus_per_task: u32,
    /// SLURM partition.
    #[arg(long)]
    partition: Option<String>,
    /// The ptacorr program the tasks run (default: this one).
    #[arg(long)]
    program: Option<PathBuf>,
    /// The campaign's own arguments after `--` (as for `ptacorr null|inject|noise`, without
    /// --out and --shard).
    #[arg(last = true, required = true)]
    args: Vec<String>,
}

pub fn run(a: JobArrayArgs, strict: bool, allow_outside_paths: bool) -> Result<()> {
    let kind = match a.kind {
        KindArg::Null => CampaignKind::Null,
        KindArg::Inject => CampaignKind::Inject,
        KindArg::Noise => CampaignKind::Noise,
    };
    let abs = |p: &PathBuf| {
        std::path::absolute(p).with_context(|| format!("making {} absolute", p.display()))
    };
    let program = match &a.program {
        Some(p) => abs(p)?,
        None => std::env::current_exe().context("finding this program's path")?,
    };
    let mut args = a.args.clone();
    if strict {
        args.insert(0, "--strict".into());
    }
    if allow_outside_paths {
        args.insert(0, "--allow-outside-paths".into());
    }
    let recipe = ArrayRecipe {
        kind,
        tasks: a.tasks,
        program,
        workdir: std::env::current_dir().context("finding the working folder")?,
        recipe_dir: abs(&a.recipe)?,
        out: abs(&a.out)?,
        args,
        job_name: a.job_name.clone(),
        time: a.time.clone(),
        cpus_per_task: a.cpus_per_task,
        partition: a.partition.clone(),
    };
    recipe.validate()?;
    // The campaign's arguments are checked now, by the campaign's own parser, so a typo fails
    // here and not in every array task.
    let mut probe: Vec<String> = vec!["ptacorr".into(), kind.name().into()];
    probe.extend(recipe.args.iter().cloned());
    probe.extend([
        "--shard".into(),
        format!("1/{}", a.tasks),
        "--out".into(),
        "shard".into(),
    ]);
    crate::Cli::try_parse_from(&probe).map_err(|e| {
        anyhow::anyhow!(
            "the campaign arguments after `--` are not valid for `ptacorr {}`:\n{e}",
            kind.name()
        )
    })?;
    recipe.write()?;
    outln!(
        "wrote {}/array.sh ({} tasks), merge.sh, submit.sh; submit with: bash {}/submit.sh",
        recipe.recipe_dir.display(),
        a.tasks,
        recipe.recipe_dir.display()
    );
    outln!(
        "the merged {} campaign will be written to {}",
        kind.name(),
        recipe.out.display()
    );
    Ok(())
}
