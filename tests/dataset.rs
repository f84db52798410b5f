//! End-to-end tests of `holdfast dataset`: a build killed mid-way and resumed gives the same
//! dataset as an uninterrupted one; damaged shards and misuse are reported with the fix.

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test code, where a panic is the failure report

use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

fn exe() -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_holdfast"));
    c.current_dir(env!("CARGO_MANIFEST_DIR"));
    c
}

fn holdfast(args: &[&str]) -> Output {
    exe().args(args).output().expect("run holdfast")
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

fn temp_dir(test: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("holdfast-ds-{test}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// The demo study with small shards, in `dir`.
fn study(dir: &Path, shard_size: usize) -> PathBuf {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(root.join("scenarios/quillmoor-study.toml")).unwrap();
    let grid = root.join("scenarios/quillmoor.toml");
    let text = text
        .replace(
            "grid = \"quillmoor.toml\"",
            &format!("grid = {:?}", grid.display().to_string()),
        )
        .replace("shard_size = 250", &format!("shard_size = {shard_size}"));
    let path = dir.join("study.toml");
    std::fs::write(&path, text).unwrap();
    path
}

fn shards(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut out: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap())
        .filter(|e| !e.file_name().to_string_lossy().starts_with('.'))
        .map(|e| {
            (
                e.file_name().to_string_lossy().into_owned(),
                std::fs::read(e.path()).unwrap(),
            )
        })
        .collect();
    out.sort();
    out
}

#[test]
fn a_build_killed_mid_way_resumes_to_the_same_dataset() {
    let dir = temp_dir("crash");
    let study = study(&dir, 4);
    let study = study.to_str().unwrap();
    let whole = dir.join("whole");
    let out = holdfast(&[
        "dataset",
        "build",
        study,
        "-n",
        "40",
        "-o",
        whole.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));

    // The same build, killed (SIGKILL) as soon as its first shards are on disk.
    let crashed = dir.join("crashed");
    let mut child = exe()
        .args(["dataset", "build", study, "-n", "40", "-o"])
        .arg(&crashed)
        .args(["--quiet", "--jobs", "1"])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let started = Instant::now();
    loop {
        let written = std::fs::read_dir(&crashed)
            .map(|d| {
                d.filter_map(Result::ok)
                    .filter(|e| e.file_name().to_string_lossy().starts_with("shard-"))
                    .count()
            })
            .unwrap_or(0);
        if written >= 2 || started.elapsed() > Duration::from_secs(120) {
            break;
        }
        std::thread::sleep(Duration::from_millis(5));
    }
    child.kill().unwrap();
    let status = child.wait().unwrap();
    let left = shards(&crashed)
        .iter()
        .filter(|f| f.0.starts_with("shard-"))
        .count();
    assert!(
        !status.success() && (1..10).contains(&left),
        "the build was not cut mid-way ({left} of 10 shards, {status})"
    );

    // Without --resume the folder is refused; with it the build completes.
    let out = holdfast(&[
        "dataset",
        "build",
        study,
        "-n",
        "40",
        "-o",
        crashed.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(!out.status.success());
    assert!(
        text(&out.stderr).contains("--resume"),
        "{}",
        text(&out.stderr)
    );
    let out = holdfast(&[
        "dataset",
        "build",
        study,
        "-n",
        "40",
        "-o",
        crashed.to_str().unwrap(),
        "--quiet",
        "--resume",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(
        text(&out.stdout).contains(&format!("{left} kept from before")),
        "{}",
        text(&out.stdout)
    );
    assert_eq!(shards(&whole), shards(&crashed));
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn damaged_shards_are_named_with_the_fix() {
    let dir = temp_dir("damaged");
    let study = study(&dir, 5);
    let data = dir.join("data");
    let out = holdfast(&[
        "dataset",
        "build",
        study.to_str().unwrap(),
        "-n",
        "10",
        "-o",
        data.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stats = holdfast(&["dataset", "stats", data.to_str().unwrap()]);
    assert!(stats.status.success(), "{}", text(&stats.stderr));
    assert!(
        text(&stats.stdout).contains("samples: 10 of 10 asked"),
        "{}",
        text(&stats.stdout)
    );

    // Truncate one shard, flip a byte in the other.
    let first = data.join("shard-00000.bin");
    let second = data.join("shard-00001.bin");
    let bytes_first = std::fs::read(&first).unwrap();
    let bytes_second = std::fs::read(&second).unwrap();
    let bytes = bytes_first.clone();
    std::fs::write(&first, &bytes[..bytes.len() / 2]).unwrap();
    let out = holdfast(&["dataset", "stats", data.to_str().unwrap()]);
    let err = text(&out.stderr);
    assert!(!out.status.success());
    assert!(
        err.contains("shard-00000.bin") && err.contains("truncated"),
        "{err}"
    );
    assert!(err.contains("--resume"), "{err}");
    std::fs::remove_file(&first).unwrap();
    let mut bytes = bytes_second.clone();
    bytes[40] ^= 0x5a;
    std::fs::write(&second, &bytes).unwrap();
    let out = holdfast(&["dataset", "stats", data.to_str().unwrap()]);
    let err = text(&out.stderr);
    assert!(
        err.contains("shard-00001.bin") && err.contains("checksum"),
        "{err}"
    );

    // Resuming writes the removed shard and the corrupted one again, as they were.
    let out = holdfast(&[
        "dataset",
        "build",
        study.to_str().unwrap(),
        "-n",
        "10",
        "-o",
        data.to_str().unwrap(),
        "--quiet",
        "--resume",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(
        text(&out.stdout).contains("damaged shards found and written again: [1]"),
        "{}",
        text(&out.stdout)
    );
    assert_eq!(std::fs::read(&first).unwrap(), bytes_first);
    assert_eq!(std::fs::read(&second).unwrap(), bytes_second);
    let out = holdfast(&["dataset", "export", data.to_str().unwrap(), "-o"]);
    assert!(!out.status.success());
    let csv = dir.join("data.csv");
    let out = holdfast(&[
        "dataset",
        "export",
        data.to_str().unwrap(),
        "--format",
        "csv",
        "-o",
        csv.to_str().unwrap(),
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let table = std::fs::read_to_string(&csv).unwrap();
    assert_eq!(table.lines().count(), 11);
    let columns = table.lines().next().unwrap().split(',').count();
    assert!(table.lines().all(|l| l.matches(',').count() + 1 >= columns));
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_study_file_with_mistakes_is_reported_by_line_field_and_value() {
    let dir = temp_dir("badstudy");
    let path = dir.join("study.toml");
    std::fs::write(
        &path,
        "format_version = 1\ngrid = \"../no-such-grid.toml\"\n[shedding]\ndelay_min_s = -1.0\n",
    )
    .unwrap();
    let out = holdfast(&[
        "dataset",
        "build",
        path.to_str().unwrap(),
        "-n",
        "5",
        "-o",
        dir.join("d").to_str().unwrap(),
    ]);
    let err = text(&out.stderr);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        err.contains("line 4: [shedding], field `delay_min_s` = -1"),
        "{err}"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The entries of a stored (uncompressed) zip archive, by walking its local headers.
fn zip_entries(bytes: &[u8]) -> Vec<(String, Vec<u8>)> {
    let u16_at = |i: usize| u16::from_le_bytes([bytes[i], bytes[i + 1]]) as usize;
    let u32_at = |i: usize| u32::from_le_bytes(bytes[i..i + 4].try_into().unwrap()) as usize;
    let mut out = Vec::new();
    let mut i = 0;
    while u32_at(i) == 0x0403_4b50 {
        assert_eq!(u16_at(i + 8), 0, "stored, not compressed");
        let size = u32_at(i + 18);
        let (name_len, extra) = (u16_at(i + 26), u16_at(i + 28));
        let name = String::from_utf8(bytes[i + 30..i + 30 + name_len].to_vec()).unwrap();
        let start = i + 30 + name_len + extra;
        out.push((name, bytes[start..start + size].to_vec()));
        i = start + size;
    }
    out
}

/// Shape and data of an `.npy` file (NumPy format 1.0).
fn npy_parts(bytes: &[u8]) -> (String, Vec<usize>, &[u8]) {
    assert_eq!(&bytes[..8], b"\x93NUMPY\x01\x00");
    let len = u16::from_le_bytes([bytes[8], bytes[9]]) as usize;
    assert_eq!((10 + len) % 64, 0, "data aligned to 64 bytes");
    let header = String::from_utf8(bytes[10..10 + len].to_vec()).unwrap();
    let shape_text = header
        .split("'shape': (")
        .nth(1)
        .unwrap()
        .split(')')
        .next()
        .unwrap();
    let shape = shape_text
        .split(',')
        .filter(|s| !s.trim().is_empty())
        .map(|s| s.trim().parse().unwrap())
        .collect();
    (header, shape, &bytes[10 + len..])
}

#[test]
fn npz_export_holds_the_dataset_as_numpy_reads_it() {
    let dir = temp_dir("npz");
    let study = study(&dir, 10);
    let data = dir.join("data");
    let out = holdfast(&[
        "dataset",
        "build",
        study.to_str().unwrap(),
        "-n",
        "30",
        "-o",
        data.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let npz = dir.join("data.npz");
    let out = holdfast(&[
        "dataset",
        "export",
        data.to_str().unwrap(),
        "--format",
        "npz",
        "-o",
        npz.to_str().unwrap(),
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stats = text(&holdfast(&["dataset", "stats", data.to_str().unwrap()]).stdout);
    let need_shed: usize = stats
        .split("need shed: ")
        .nth(1)
        .unwrap()
        .split_whitespace()
        .next()
        .unwrap()
        .parse()
        .unwrap();

    // Read it back by the format specifications (zip APPNOTE, NumPy NEP 1).
    let entries = zip_entries(&std::fs::read(&npz).unwrap());
    let get = |name: &str| {
        entries
            .iter()
            .find(|e| e.0 == name)
            .unwrap_or_else(|| panic!("{name} missing"))
            .1
            .clone()
    };
    let outcome_file = get("outcome.npy");
    let (header, shape, outcome) = npy_parts(&outcome_file);
    assert!(header.contains("'descr': '|i1'"), "{header}");
    assert_eq!(shape, vec![30]);
    assert_eq!(outcome.iter().filter(|&&o| o == 1).count(), need_shed);
    let shed_file = get("shed_mw.npy");
    let (_, shape, shed) = npy_parts(&shed_file);
    assert_eq!(shape, vec![30, 32]);
    let total_file = get("total_shed_mw.npy");
    let (_, _, total) = npy_parts(&total_file);
    let f = |b: &[u8], k: usize| f64::from_le_bytes(b[8 * k..8 * k + 8].try_into().unwrap());
    for s in 0..30 {
        let row: f64 = (0..32).map(|b| f(shed, s * 32 + b)).sum();
        if outcome[s] <= 2 && (outcome[s] as i8) >= 0 {
            assert!(
                (row - f(total, s)).abs() < 1e-6,
                "sample {s}: {row} vs {}",
                f(total, s)
            );
        }
    }

    // And with NumPy itself where it is installed (CI installs it).
    let script = format!(
        "import numpy as np\nd = np.load({:?})\nassert d['shed_mw'].shape == (30, 32)\n\
         assert int((d['outcome'] == 1).sum()) == {need_shed}\nprint('numpy read', len(d.files), 'arrays')\n",
        npz.display().to_string()
    );
    match Command::new("python3").args(["-c", &script]).output() {
        Ok(o) if o.status.success() => eprintln!("{}", text(&o.stdout).trim()),
        Ok(o) if text(&o.stderr).contains("No module named 'numpy'") => {
            eprintln!("numpy is not installed here: checked by the format specifications only");
        }
        Ok(o) => panic!("numpy could not read the export: {}", text(&o.stderr)),
        Err(_) => {
            eprintln!("python3 is not installed here: checked by the format specifications only")
        }
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_planned_job_array_run_task_by_task_and_merged_equals_one_build() {
    // The scripts run as Slurm would run them (each array task with its SLURM_ARRAY_TASK_ID,
    // then the merge), here without Slurm; tests/slurm.sh submits them to a real one.
    let dir = temp_dir("plan");
    let study = study(&dir, 10);
    let one = dir.join("one");
    let planned = dir.join("planned");
    let out = holdfast(&[
        "dataset",
        "plan",
        study.to_str().unwrap(),
        "-n",
        "45",
        "--tasks",
        "4",
        "--cpus-per-task",
        "1",
        "--calibrate",
        "2",
        "-o",
        planned.to_str().unwrap(),
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let said = text(&out.stdout);
    assert!(
        said.contains("4 array tasks of at most 20 samples"),
        "{said}"
    );
    let plan_dir = dir.join("planned.slurm");
    let array = std::fs::read_to_string(plan_dir.join("array.sbatch")).unwrap();
    assert!(array.contains("#SBATCH --array=1-4"), "{array}");
    assert!(array.contains("core-seconds per sample"), "{array}");
    let bash = |script: &str, task: Option<u32>| {
        let mut c = Command::new("bash");
        c.arg(plan_dir.join(script));
        if let Some(k) = task {
            c.env("SLURM_ARRAY_TASK_ID", k.to_string())
                .env("SLURM_CPUS_PER_TASK", "1");
        }
        let o = c.output().unwrap();
        assert!(o.status.success(), "{script} {task:?}: {}", text(&o.stderr));
    };
    // The merge refuses while parts are missing, naming the first.
    bash("array.sbatch", Some(2));
    let o = Command::new("bash")
        .arg(plan_dir.join("merge.sbatch"))
        .output()
        .unwrap();
    assert!(!o.status.success());
    assert!(text(&o.stderr).contains("part-1"), "{}", text(&o.stderr));
    // Every task (task 2 again: it resumes and keeps its shards), then the merge.
    for k in 1..=4 {
        bash("array.sbatch", Some(k));
    }
    bash("merge.sbatch", None);
    let o = holdfast(&[
        "dataset",
        "build",
        study.to_str().unwrap(),
        "-n",
        "45",
        "-o",
        one.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert_eq!(shards(&planned), shards(&one));
    let shard_files = shards(&one)
        .iter()
        .filter(|(name, _)| name.starts_with("shard-"))
        .count();
    assert_eq!(shard_files, 5);
    let _ = std::fs::remove_dir_all(&dir);
}
