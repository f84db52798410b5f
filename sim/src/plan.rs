//! Batch scripts that build a dataset as a Slurm job array: one array task per part
//! (`dataset build --shard K/N --resume` into its own folder), then a merge job that runs only
//! after every task succeeded. Resource requests come from a measured cost per sample.
//!
//! Re-submitting after failed or pre-empted tasks re-runs only what is missing: every task
//! resumes its folder, keeping complete shards, so a finished part ends at once.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// What a plan is made from.
#[derive(Clone, Debug, PartialEq)]
pub struct PlanInput {
    /// The `holdfast` executable the tasks run (absolute).
    pub holdfast: PathBuf,
    /// The study file (absolute).
    pub study: PathBuf,
    /// The dataset folder the merge writes (absolute).
    pub out: PathBuf,
    /// Samples in the dataset.
    pub samples: u64,
    /// Samples per shard (the study's).
    pub shard_size: u64,
    /// Array tasks.
    pub tasks: u32,
    /// Cores per task.
    pub cpus_per_task: u32,
    /// Measured labelling cost, core-seconds per sample.
    pub seconds_per_sample: f64,
    /// How the cost was measured (for the scripts' comments).
    pub measured: String,
    /// Measured peak memory of one labelling process, MB.
    pub peak_memory_mb: f64,
}

/// The scripts of a plan and where they go.
#[derive(Clone, Debug, PartialEq)]
pub struct Plan {
    /// The folder holding the scripts, the parts and the logs (`OUT.slurm`, beside `OUT`).
    pub dir: PathBuf,
    /// `array.sbatch`: the job array.
    pub array: String,
    /// `merge.sbatch`: the merge, after the array.
    pub merge: String,
    /// `submit.sh`: submits both with the dependency.
    pub submit: String,
    /// Time requested per array task, minutes.
    pub task_minutes: u64,
    /// Memory requested per array task, MB.
    pub task_memory_mb: u64,
    /// Most samples one task labels.
    pub samples_per_task: u64,
}

/// Safety factor on the estimated task time (machines and operating points vary).
pub const TIME_FACTOR: f64 = 2.0;
/// Minutes added to every task's time (start-up, file system).
pub const TIME_PAD_MINUTES: f64 = 5.0;

/// The folder of a plan for dataset folder `out`: `out` with `.slurm` appended.
pub fn plan_dir(out: &Path) -> PathBuf {
    let mut s = out.as_os_str().to_owned();
    s.push(".slurm");
    PathBuf::from(s)
}

/// Slurm's `D-HH:MM:SS` of a number of minutes.
pub fn slurm_time(minutes: u64) -> String {
    let (d, rest) = (minutes / 1440, minutes % 1440);
    format!("{d}-{:02}:{:02}:00", rest / 60, rest % 60)
}

/// Quotes a path or word for bash (single quotes; an embedded quote closes, escapes, reopens).
pub fn shell_quote(s: &str) -> String {
    format!("'{}'", s.replace('\'', r"'\''"))
}

/// Writes the plan's scripts as text (pure; the caller writes the files).
pub fn slurm_plan(p: &PlanInput) -> Plan {
    let dir = plan_dir(&p.out);
    let shards = p.samples.div_ceil(p.shard_size.max(1));
    let tasks = u64::from(p.tasks.max(1));
    let shards_per_task = shards.div_ceil(tasks);
    let samples_per_task = (shards_per_task * p.shard_size).min(p.samples);
    let cpus = f64::from(p.cpus_per_task.max(1));
    let estimate_min = samples_per_task as f64 * p.seconds_per_sample / cpus / 60.0;
    let task_minutes = (estimate_min * TIME_FACTOR + TIME_PAD_MINUTES).ceil() as u64;
    // One worker process holds the grid, the fault set and a shard in memory; labelling
    // threads share them. Twice the measured peak, at least 1 GB.
    let task_memory_mb = (2.0 * p.peak_memory_mb).max(1024.0).ceil() as u64;
    let q = |path: &Path| shell_quote(&path.display().to_string());
    let hf = q(&p.holdfast);
    let parts = dir.join("parts");
    let logs = dir.join("logs");
    let name = p
        .out
        .file_name()
        .map_or("dataset".to_string(), |n| n.to_string_lossy().into_owned());

    let mut array = String::new();
    let _ = writeln!(array, "#!/bin/bash");
    let _ = writeln!(
        array,
        "#SBATCH --job-name={}",
        slurm_word(&format!("holdfast-{name}"))
    );
    let _ = writeln!(array, "#SBATCH --array=1-{}", p.tasks);
    let _ = writeln!(array, "#SBATCH --cpus-per-task={}", p.cpus_per_task);
    let _ = writeln!(array, "#SBATCH --time={}", slurm_time(task_minutes));
    let _ = writeln!(array, "#SBATCH --mem={task_memory_mb}M");
    let _ = writeln!(array, "#SBATCH --output={}/part-%a.log", logs.display());
    let _ = writeln!(array, "#");
    let _ = writeln!(
        array,
        "# Holdfast dataset build as a job array: task K of {} labels shards j with j mod {} = K-1",
        p.tasks, p.tasks
    );
    let _ = writeln!(
        array,
        "# ({shards} shards of {} samples, at most {shards_per_task} shards = {samples_per_task} \
         samples per task) into its own folder under {}.",
        p.shard_size,
        parts.display()
    );
    let _ = writeln!(
        array,
        "# Cost measured when planned: {:.3} core-seconds per sample ({}); peak memory {:.0} MB.",
        p.seconds_per_sample, p.measured, p.peak_memory_mb
    );
    let _ = writeln!(
        array,
        "# Time: {samples_per_task} samples x {:.3} s / {} cores = {estimate_min:.1} min, x{TIME_FACTOR} \
         + {TIME_PAD_MINUTES} min = {task_minutes} min. Memory: twice the peak, at least 1 GB.",
        p.seconds_per_sample, p.cpus_per_task
    );
    let _ = writeln!(
        array,
        "# Every task resumes its folder (complete shards are kept), so re-submitting after failed"
    );
    let _ = writeln!(array, "# or pre-empted tasks re-runs only what is missing.");
    let _ = writeln!(array, "set -euo pipefail");
    let _ = writeln!(
        array,
        "k=\"${{SLURM_ARRAY_TASK_ID:?not run as an array task}}\""
    );
    let _ = writeln!(
        array,
        "exec {hf} dataset build {} -n {} -o {}/part-\"$k\" --shard \"$k\"/{} --resume \
         --jobs \"${{SLURM_CPUS_PER_TASK:-1}}\" --quiet",
        q(&p.study),
        p.samples,
        shell_quote(&parts.display().to_string()),
        p.tasks
    );

    let mut merge = String::new();
    let _ = writeln!(merge, "#!/bin/bash");
    let _ = writeln!(
        merge,
        "#SBATCH --job-name={}",
        slurm_word(&format!("holdfast-{name}-merge"))
    );
    let _ = writeln!(merge, "#SBATCH --cpus-per-task=1");
    let _ = writeln!(merge, "#SBATCH --time={}", slurm_time(30));
    let _ = writeln!(merge, "#SBATCH --mem=1024M");
    let _ = writeln!(merge, "#SBATCH --output={}/merge.log", logs.display());
    let _ = writeln!(merge, "#");
    let _ = writeln!(
        merge,
        "# Merges the {} parts into {} once every array task succeeded (submit.sh sets the",
        p.tasks,
        p.out.display()
    );
    let _ = writeln!(
        merge,
        "# dependency); fails if any shard is missing, naming it."
    );
    let _ = writeln!(merge, "set -euo pipefail");
    let part_list: Vec<String> = (1..=p.tasks)
        .map(|k| shell_quote(&parts.join(format!("part-{k}")).display().to_string()))
        .collect();
    let _ = writeln!(
        merge,
        "exec {hf} dataset merge {} -o {} --require-complete",
        part_list.join(" "),
        q(&p.out)
    );

    let mut submit = String::new();
    let _ = writeln!(submit, "#!/bin/bash");
    let _ = writeln!(
        submit,
        "# Submits the job array and the merge that waits for it; prints both job ids."
    );
    let _ = writeln!(
        submit,
        "# Run again after failed or pre-empted tasks: only missing shards are labelled."
    );
    let _ = writeln!(submit, "set -euo pipefail");
    let _ = writeln!(submit, "cd \"$(dirname \"$0\")\"");
    let _ = writeln!(submit, "mkdir -p {} {}", q(&logs), q(&parts));
    let _ = writeln!(submit, "array=$(sbatch --parsable array.sbatch)");
    let _ = writeln!(submit, "array=\"${{array%%;*}}\"");
    let _ = writeln!(
        submit,
        "merge=$(sbatch --parsable --dependency=afterok:\"$array\" merge.sbatch)"
    );
    let _ = writeln!(
        submit,
        "echo \"array job $array, merge job ${{merge%%;*}}\""
    );

    Plan {
        dir,
        array,
        merge,
        submit,
        task_minutes,
        task_memory_mb,
        samples_per_task,
    }
}

/// A job name Slurm accepts: letters, digits, `-`, `_` and `.`; anything else becomes `_`.
fn slurm_word(s: &str) -> String {
    s.chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || "-_.".contains(c) {
                c
            } else {
                '_'
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn input() -> PlanInput {
        PlanInput {
            holdfast: "/opt/holdfast/bin/holdfast".into(),
            study: "/home/r/study's file.toml".into(),
            out: "/scratch/r/big".into(),
            samples: 10_000,
            shard_size: 250,
            tasks: 16,
            cpus_per_task: 4,
            seconds_per_sample: 0.06,
            measured: "16 samples on one core".into(),
            peak_memory_mb: 40.0,
        }
    }

    #[test]
    fn resources_follow_the_measured_cost() {
        let plan = slurm_plan(&input());
        // 40 shards over 16 tasks: at most 3 shards = 750 samples per task;
        // 750 x 0.06 s / 4 cores = 11.25 s = 0.1875 min; x2 + 5 = 5.375 -> 6 min.
        assert_eq!(plan.samples_per_task, 750);
        assert_eq!(plan.task_minutes, 6);
        assert_eq!(plan.task_memory_mb, 1024);
        assert!(plan.array.contains("#SBATCH --array=1-16\n"));
        assert!(plan.array.contains("#SBATCH --time=0-00:06:00\n"));
        assert!(plan.array.contains("#SBATCH --cpus-per-task=4\n"));
        assert_eq!(plan.dir, PathBuf::from("/scratch/r/big.slurm"));
    }

    #[test]
    fn tasks_resume_their_own_part_and_the_merge_needs_every_part() {
        let plan = slurm_plan(&input());
        assert!(plan.array.contains(
            "exec '/opt/holdfast/bin/holdfast' dataset build '/home/r/study'\\''s file.toml' \
             -n 10000 -o '/scratch/r/big.slurm/parts'/part-\"$k\" --shard \"$k\"/16 --resume"
        ));
        assert!(plan.merge.contains(
            "'/scratch/r/big.slurm/parts/part-16' -o '/scratch/r/big' --require-complete"
        ));
        assert!(
            plan.submit
                .contains("--dependency=afterok:\"$array\" merge.sbatch")
        );
    }

    #[test]
    fn slurm_times_and_quotes() {
        assert_eq!(slurm_time(6), "0-00:06:00");
        assert_eq!(slurm_time(1441), "1-00:01:00");
        assert_eq!(shell_quote("a'b"), r"'a'\''b'");
        assert_eq!(slurm_word("holdfast-my data"), "holdfast-my_data");
    }
}
