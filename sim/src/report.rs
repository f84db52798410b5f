//! Reading a dataset folder: statistics, merging the folders of a split build, CSV export.

use std::collections::{BTreeMap, BTreeSet};
use std::fmt;
use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

use crate::contingency::ContingencyKind;
use crate::dataset::{
    DatasetError, Manifest, Sample, SampleBody, io_error, read_shard, shard_file_name, write_atomic,
};
use crate::generate::complete_shards;
use crate::label::Outcome;
use crate::sampling::Rejection;

/// Calls `f` on every sample of the complete shards of a dataset, in index order, one shard in
/// memory at a time. Returns the manifest and the shards missing.
pub fn for_each_sample(
    dir: &Path,
    mut f: impl FnMut(&Sample),
) -> Result<(Manifest, Vec<u32>), DatasetError> {
    let manifest = Manifest::read(dir)?;
    let complete = complete_shards(dir, &manifest)?;
    for &j in &complete {
        let (_, samples) = read_shard(&dir.join(shard_file_name(j)))?;
        samples.iter().for_each(&mut f);
    }
    let missing = (0..manifest.shard_count)
        .filter(|j| !complete.contains(j))
        .collect();
    Ok((manifest, missing))
}

/// Counts of one contingency kind.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct KindCounts {
    /// Labelled samples of this kind.
    pub labelled: u64,
    /// Of those, needing shed.
    pub shed: u64,
    /// Of those, unsavable.
    pub unsavable: u64,
}

/// Statistics of a dataset.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Stats {
    /// Samples in complete shards.
    pub samples: u64,
    /// Samples asked for.
    pub asked: u64,
    /// Shards missing.
    pub missing_shards: Vec<u32>,
    /// Labelled samples by outcome.
    pub no_shed: u64,
    /// Needing shed (and saved by it).
    pub shed: u64,
    /// Not saved by all shed-able load.
    pub unsavable: u64,
    /// Samples whose every draw was rejected.
    pub rejected: u64,
    /// Samples that could not be simulated.
    pub failed: u64,
    /// Labelled samples flagged non-monotone.
    pub non_monotone: u64,
    /// Rejected draws by reason (over all samples).
    pub rejections: BTreeMap<Rejection, u64>,
    /// Per contingency kind.
    pub by_kind: BTreeMap<ContingencyKind, KindCounts>,
    /// Simulations over all labelled samples.
    pub simulations: u64,
    /// Total shed of the samples needing shed, MW, sorted.
    pub shed_mw: Vec<f64>,
    /// Shed as a share of the shed-able load, same order as drawn (for the histogram).
    pub shed_share: Vec<f64>,
}

impl Stats {
    /// Labelled samples.
    pub fn labelled(&self) -> u64 {
        self.no_shed + self.shed + self.unsavable
    }
}

/// Reads a dataset's statistics.
pub fn stats(dir: &Path) -> Result<Stats, DatasetError> {
    let mut st = Stats::default();
    let (manifest, missing) = for_each_sample(dir, |s| {
        st.samples += 1;
        for r in &s.rejections {
            *st.rejections.entry(*r).or_default() += 1;
        }
        match &s.body {
            SampleBody::Rejected => st.rejected += 1,
            SampleBody::Failed { .. } => st.failed += 1,
            SampleBody::Labelled(l) => {
                let kind = st.by_kind.entry(l.contingency.kind).or_default();
                kind.labelled += 1;
                st.simulations += u64::from(l.label.simulations);
                if l.label.non_monotone {
                    st.non_monotone += 1;
                }
                match l.label.outcome {
                    Outcome::NoShedNeeded => st.no_shed += 1,
                    Outcome::Shed => {
                        st.shed += 1;
                        kind.shed += 1;
                        st.shed_mw.push(l.label.total_mw);
                        if l.label.sheddable_mw > 0.0 {
                            st.shed_share.push(l.label.total_mw / l.label.sheddable_mw);
                        }
                    }
                    Outcome::Unsavable => {
                        st.unsavable += 1;
                        kind.unsavable += 1;
                    }
                }
            }
        }
    })?;
    st.asked = manifest.samples;
    st.missing_shards = missing;
    st.shed_mw.sort_by(f64::total_cmp);
    Ok(st)
}

fn pct(a: u64, b: u64) -> f64 {
    if b == 0 {
        0.0
    } else {
        100.0 * a as f64 / b as f64
    }
}

fn quantile(sorted: &[f64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let k = ((sorted.len() - 1) as f64 * q).round() as usize;
    sorted[k.min(sorted.len() - 1)]
}

impl fmt::Display for Stats {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let lab = self.labelled();
        writeln!(
            f,
            "samples: {} of {} asked{}",
            self.samples,
            self.asked,
            if self.missing_shards.is_empty() {
                String::new()
            } else {
                format!(
                    " (shards missing: {:?}; finish with `holdfast dataset build ... --resume`)",
                    self.missing_shards
                )
            }
        )?;
        writeln!(
            f,
            "labelled: {lab}   no shed needed: {} ({:.1} %)   need shed: {} ({:.1} %)   \
             unsavable: {} ({:.1} %)",
            self.no_shed,
            pct(self.no_shed, lab),
            self.shed,
            pct(self.shed, lab),
            self.unsavable,
            pct(self.unsavable, lab)
        )?;
        writeln!(
            f,
            "not labelled: {} rejected (every draw), {} failed to simulate; non-monotone: {}",
            self.rejected, self.failed, self.non_monotone
        )?;
        let draws: u64 = self.rejections.values().sum();
        if draws > 0 {
            write!(f, "rejected draws: {draws} (")?;
            for (k, (r, n)) in self.rejections.iter().enumerate() {
                write!(f, "{}{}: {n}", if k > 0 { "; " } else { "" }, r.describe())?;
            }
            writeln!(f, ")")?;
        }
        writeln!(
            f,
            "simulations per labelled sample: {:.2}",
            if lab == 0 {
                0.0
            } else {
                self.simulations as f64 / lab as f64
            }
        )?;
        writeln!(f, "by contingency kind:")?;
        for (kind, c) in &self.by_kind {
            writeln!(
                f,
                "  {:<16} {:>7} labelled, {:>5.1} % need shed, {:>5.1} % unsavable",
                kind.name(),
                c.labelled,
                pct(c.shed, c.labelled),
                pct(c.unsavable, c.labelled)
            )?;
        }
        if !self.shed_mw.is_empty() {
            let s = &self.shed_mw;
            writeln!(
                f,
                "total shed when needed, MW: min {:.1}, quartiles {:.1} / {:.1} / {:.1}, max {:.1}",
                s[0],
                quantile(s, 0.25),
                quantile(s, 0.5),
                quantile(s, 0.75),
                s[s.len() - 1]
            )?;
            writeln!(f, "histogram of shed / shed-able load:")?;
            let bins = 10;
            let mut counts = vec![0u64; bins];
            for &x in &self.shed_share {
                counts[((x * bins as f64) as usize).min(bins - 1)] += 1;
            }
            let top = counts.iter().copied().max().unwrap_or(1).max(1);
            for (b, &c) in counts.iter().enumerate() {
                let bar = "#".repeat((40 * c).div_ceil(top) as usize);
                writeln!(
                    f,
                    "  {:>3.0}-{:>3.0} % {:>7} {bar}",
                    100.0 * b as f64 / bins as f64,
                    100.0 * (b + 1) as f64 / bins as f64,
                    c
                )?;
            }
        }
        Ok(())
    }
}

/// What a merge did.
#[derive(Clone, Debug, PartialEq)]
pub struct MergeReport {
    /// Shards copied.
    pub shards: usize,
    /// Shards of the dataset found in none of the inputs.
    pub missing: Vec<u32>,
}

/// Combines the folders of a split build into `out`: their manifests must describe the same
/// study, grid and size, every shard is checked, and a shard found in several inputs must be
/// identical in all.
pub fn merge(inputs: &[PathBuf], out: &Path) -> Result<MergeReport, DatasetError> {
    let Some(first) = inputs.first() else {
        return Err(DatasetError::Folder {
            path: out.to_path_buf(),
            message: "nothing to merge: name at least one dataset folder".to_string(),
        });
    };
    let reference = Manifest::read(first)?;
    let mut sources: BTreeMap<u32, PathBuf> = BTreeMap::new();
    for dir in inputs {
        let m = Manifest::read(dir)?;
        if (&m.study_hash, &m.grid_fingerprint, m.samples, m.shard_size)
            != (
                &reference.study_hash,
                &reference.grid_fingerprint,
                reference.samples,
                reference.shard_size,
            )
        {
            return Err(DatasetError::Folder {
                path: dir.clone(),
                message: format!(
                    "belongs to another study, grid or size than {} (study {} vs {}, grid {} vs \
                     {}, {} vs {} samples)",
                    first.display(),
                    m.study_hash,
                    reference.study_hash,
                    m.grid_fingerprint,
                    reference.grid_fingerprint,
                    m.samples,
                    reference.samples
                ),
            });
        }
        for j in complete_shards(dir, &reference)? {
            let path = dir.join(shard_file_name(j));
            if let Some(other) = sources.get(&j) {
                let a = fs::read(&path).map_err(io_error(&path))?;
                let b = fs::read(other).map_err(io_error(other))?;
                if a != b {
                    return Err(DatasetError::Shard {
                        path,
                        problem: format!("differs from {}", other.display()),
                        fix: "the builds disagree: rebuild that shard (delete both copies and \
                              resume one build)"
                            .to_string(),
                    });
                }
            } else {
                sources.insert(j, path);
            }
        }
    }
    fs::create_dir_all(out).map_err(io_error(out))?;
    for (j, src) in &sources {
        let bytes = fs::read(src).map_err(io_error(src))?;
        write_atomic(&out.join(shard_file_name(*j)), &bytes)?;
    }
    let grid_src = first.join("grid.toml");
    let grid = fs::read(&grid_src).map_err(io_error(&grid_src))?;
    write_atomic(&out.join("grid.toml"), &grid)?;
    // The study copy (absent in folders built before it was kept; the hash check in
    // `Generator::for_dataset` guards its use).
    if let Some(study) = inputs
        .iter()
        .map(|d| d.join(crate::generate::STUDY_FILE))
        .find(|p| p.is_file())
    {
        let text = fs::read(&study).map_err(io_error(&study))?;
        write_atomic(&out.join(crate::generate::STUDY_FILE), &text)?;
    }
    let complete: BTreeSet<u32> = sources.keys().copied().collect();
    let manifest = Manifest {
        complete: complete.iter().copied().collect(),
        ..reference
    };
    manifest.write(out)?;
    Ok(MergeReport {
        shards: complete.len(),
        missing: (0..manifest.shard_count)
            .filter(|j| !complete.contains(j))
            .collect(),
    })
}

/// Writes one CSV row per sample: the sample's outcome, contingency, operating-point summary
/// and label, then the shed at every bus that has load (one column per bus number, MW).
pub fn export_csv(dir: &Path, out: &Path) -> Result<u64, DatasetError> {
    let grid = holdfast_core::format::load_grid(&dir.join("grid.toml"))?;
    let mut buses: Vec<u32> = grid
        .loads
        .iter()
        .map(|l| grid.buses[l.bus.get()].number)
        .collect();
    buses.sort_unstable();
    buses.dedup();
    let mut text = String::from(
        "index,outcome,contingency_kind,contingency,load_level,total_load_mw,total_wind_mw,\
         inertia_mws,delay_s,total_shed_mw,sheddable_mw,tolerance_mw,simulations,non_monotone,\
         failed_criterion",
    );
    for b in &buses {
        text.push_str(&format!(",shed_mw_bus_{b}"));
    }
    text.push('\n');
    let mut rows = 0;
    for_each_sample(dir, |s| {
        rows += 1;
        match &s.body {
            SampleBody::Rejected => {
                text.push_str(&format!(
                    "{},rejected{}\n",
                    s.index,
                    ",".repeat(13 + buses.len())
                ));
            }
            SampleBody::Failed { message, .. } => {
                text.push_str(&format!(
                    "{},failed,,\"{}\"{}\n",
                    s.index,
                    message.replace('"', "'"),
                    ",".repeat(11 + buses.len())
                ));
            }
            SampleBody::Labelled(l) => {
                let lab = &l.label;
                let outcome = match lab.outcome {
                    Outcome::NoShedNeeded => "no_shed",
                    Outcome::Shed => "shed",
                    Outcome::Unsavable => "unsavable",
                };
                text.push_str(&format!(
                    "{},{},{},\"{}\",{:.6},{:.3},{:.3},{:.1},{:.4},{:.3},{:.3},{:.3},{},{},{}",
                    s.index,
                    outcome,
                    l.contingency.kind.name(),
                    l.contingency.description.replace('"', "'"),
                    l.point.draw.load_level,
                    l.point.total_load_mw,
                    l.point.total_wind_mw,
                    l.point.inertia_mws,
                    l.delay_s,
                    lab.total_mw,
                    lab.sheddable_mw,
                    lab.tolerance_mw,
                    lab.simulations,
                    lab.non_monotone,
                    lab.verdict.failed.as_deref().unwrap_or("")
                ));
                for b in &buses {
                    let mw = lab
                        .shed_mw
                        .iter()
                        .find(|(n, _)| n == b)
                        .map_or(0.0, |(_, mw)| *mw);
                    text.push_str(&format!(",{mw:.3}"));
                }
                text.push('\n');
            }
        }
    })?;
    let mut f = fs::File::create(out).map_err(io_error(out))?;
    f.write_all(text.as_bytes()).map_err(io_error(out))?;
    Ok(rows)
}

/// Outcome codes of the NPZ export's `outcome` array.
pub const NPZ_OUTCOMES: [(&str, i8); 5] = [
    ("no shed needed", 0),
    ("shed", 1),
    ("unsavable", 2),
    ("rejected (every draw)", -1),
    ("failed to simulate", -2),
];

/// Writes a NumPy `.npz` archive: one row per sample (index order) in every array.
///
/// Per sample: `index`, `outcome` (codes in [`NPZ_OUTCOMES`]), `contingency_kind` (0 branch
/// fault, 1 double fault, 2 machine trip, 3 wind-plant trip, -1 none), `disturbance_bus`
/// (bus number, -1 none), `load_level`, `total_load_mw`, `total_wind_mw`, `inertia_mws`,
/// `delay_s`, `total_shed_mw`, `sheddable_mw`, `tolerance_mw`, `simulations`, `non_monotone`.
/// Per sample and element (NaN where the sample has no operating point): `shed_mw` (by bus),
/// `bus_v_pu`, `bus_angle_deg` (by bus), `load_p_mw`, `load_q_mvar` (by load),
/// `machine_p_mw`, `machine_on` (by machine), `wind_p_mw` (by wind plant). Element orders:
/// `bus_numbers`, and the grid file's order of loads, machines and wind plants (`grid.toml` in
/// the dataset folder). Held in memory while written.
pub fn export_npz(dir: &Path, out: &Path) -> Result<u64, DatasetError> {
    use crate::npz::{Dtype, ZipWriter, f64_bytes, i64_bytes, npy};
    let grid = holdfast_core::format::load_grid(&dir.join("grid.toml"))?;
    let (nb, nl, nm, nw) = (
        grid.n_buses(),
        grid.loads.len(),
        grid.machines.len(),
        grid.wind_plants.len(),
    );
    let bus_numbers: Vec<i64> = grid.buses.iter().map(|b| i64::from(b.number)).collect();
    let mut index = Vec::new();
    let mut outcome: Vec<i8> = Vec::new();
    let mut kind: Vec<i8> = Vec::new();
    let mut disturbance = Vec::new();
    let mut scalars: [Vec<f64>; 9] = Default::default();
    let mut simulations = Vec::new();
    let mut non_monotone: Vec<u8> = Vec::new();
    let (mut shed, mut v, mut angle) = (Vec::new(), Vec::new(), Vec::new());
    let (mut load_p, mut load_q, mut mach_p, mut mach_on, mut wind_p) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new(), Vec::new());
    let nan = f64::NAN;
    for_each_sample(dir, |s| {
        index.push(s.index as i64);
        let (point, labelled) = match &s.body {
            SampleBody::Labelled(l) => (Some(&l.point), Some(l)),
            SampleBody::Failed { point, .. } => (Some(point.as_ref()), None),
            SampleBody::Rejected => (None, None),
        };
        outcome.push(match (&s.body, labelled) {
            (_, Some(l)) => match l.label.outcome {
                Outcome::NoShedNeeded => 0,
                Outcome::Shed => 1,
                Outcome::Unsavable => 2,
            },
            (SampleBody::Rejected, _) => -1,
            _ => -2,
        });
        kind.push(labelled.map_or(-1, |l| {
            ContingencyKind::ALL
                .iter()
                .position(|k| *k == l.contingency.kind)
                .map_or(-1, |k| k as i8)
        }));
        disturbance.push(labelled.map_or(-1, |l| {
            bus_numbers
                .get(l.contingency.disturbance_bus as usize)
                .copied()
                .unwrap_or(-1)
        }));
        let values = [
            point.map_or(nan, |p| p.draw.load_level),
            point.map_or(nan, |p| p.total_load_mw),
            point.map_or(nan, |p| p.total_wind_mw),
            point.map_or(nan, |p| p.inertia_mws),
            labelled.map_or(nan, |l| l.delay_s),
            labelled.map_or(nan, |l| l.label.total_mw),
            labelled.map_or(nan, |l| l.label.sheddable_mw),
            labelled.map_or(nan, |l| l.label.tolerance_mw),
            labelled.map_or(nan, |l| l.label.verdict.max_angle_deg),
        ];
        for (column, value) in scalars.iter_mut().zip(values) {
            column.push(value);
        }
        simulations.push(labelled.map_or(0, |l| i64::from(l.label.simulations)));
        non_monotone.push(u8::from(labelled.is_some_and(|l| l.label.non_monotone)));
        let mut row = vec![if labelled.is_some() { 0.0 } else { nan }; nb];
        if let Some(l) = labelled {
            for (number, mw) in &l.label.shed_mw {
                if let Some(k) = bus_numbers.iter().position(|b| *b == i64::from(*number)) {
                    row[k] = *mw;
                }
            }
        }
        shed.extend(row);
        let fill = |dst: &mut Vec<f64>, src: Option<&Vec<f64>>, n: usize| match src {
            Some(x) if x.len() == n => dst.extend_from_slice(x),
            _ => dst.extend(std::iter::repeat_n(nan, n)),
        };
        fill(&mut v, point.map(|p| &p.bus_v_pu), nb);
        fill(&mut angle, point.map(|p| &p.bus_angle_deg), nb);
        fill(&mut load_p, point.map(|p| &p.load_p_mw), nl);
        fill(&mut load_q, point.map(|p| &p.load_q_mvar), nl);
        fill(&mut mach_p, point.map(|p| &p.machine_p_mw), nm);
        fill(&mut wind_p, point.map(|p| &p.wind_p_mw), nw);
        match point {
            Some(p) if p.machine_on.len() == nm => {
                mach_on.extend(p.machine_on.iter().map(|&on| u8::from(on)));
            }
            _ => mach_on.extend(std::iter::repeat_n(0u8, nm)),
        }
    })?;
    let n = index.len();
    let mut zip = ZipWriter::default();
    let mut entries: Vec<(String, Vec<u8>)> = vec![
        (
            "index.npy".into(),
            npy(Dtype::I64, &[n], &i64_bytes(&index)),
        ),
        (
            "outcome.npy".into(),
            npy(
                Dtype::I8,
                &[n],
                &outcome.iter().map(|&x| x as u8).collect::<Vec<_>>(),
            ),
        ),
        (
            "contingency_kind.npy".into(),
            npy(
                Dtype::I8,
                &[n],
                &kind.iter().map(|&x| x as u8).collect::<Vec<_>>(),
            ),
        ),
        (
            "disturbance_bus.npy".into(),
            npy(Dtype::I64, &[n], &i64_bytes(&disturbance)),
        ),
        (
            "simulations.npy".into(),
            npy(Dtype::I64, &[n], &i64_bytes(&simulations)),
        ),
        (
            "non_monotone.npy".into(),
            npy(Dtype::Bool, &[n], &non_monotone),
        ),
        (
            "bus_numbers.npy".into(),
            npy(Dtype::I64, &[nb], &i64_bytes(&bus_numbers)),
        ),
        (
            "shed_mw.npy".into(),
            npy(Dtype::F64, &[n, nb], &f64_bytes(&shed)),
        ),
        (
            "bus_v_pu.npy".into(),
            npy(Dtype::F64, &[n, nb], &f64_bytes(&v)),
        ),
        (
            "bus_angle_deg.npy".into(),
            npy(Dtype::F64, &[n, nb], &f64_bytes(&angle)),
        ),
        (
            "load_p_mw.npy".into(),
            npy(Dtype::F64, &[n, nl], &f64_bytes(&load_p)),
        ),
        (
            "load_q_mvar.npy".into(),
            npy(Dtype::F64, &[n, nl], &f64_bytes(&load_q)),
        ),
        (
            "machine_p_mw.npy".into(),
            npy(Dtype::F64, &[n, nm], &f64_bytes(&mach_p)),
        ),
        (
            "machine_on.npy".into(),
            npy(Dtype::Bool, &[n, nm], &mach_on),
        ),
        (
            "wind_p_mw.npy".into(),
            npy(Dtype::F64, &[n, nw], &f64_bytes(&wind_p)),
        ),
    ];
    let names = [
        "load_level",
        "total_load_mw",
        "total_wind_mw",
        "inertia_mws",
        "delay_s",
        "total_shed_mw",
        "sheddable_mw",
        "tolerance_mw",
        "max_angle_deg",
    ];
    for (name, column) in names.iter().zip(&scalars) {
        entries.push((
            format!("{name}.npy"),
            npy(Dtype::F64, &[n], &f64_bytes(column)),
        ));
    }
    let too_large = || DatasetError::Folder {
        path: out.to_path_buf(),
        message: "the export passes the zip format's 4 GiB limit: export CSV, or fewer samples"
            .to_string(),
    };
    for (name, data) in &entries {
        zip.add(name, data).map_err(|_| too_large())?;
    }
    let bytes = zip.finish().map_err(|_| too_large())?;
    write_atomic(out, &bytes)?;
    Ok(n as u64)
}
