//! Several jobs in one call: job files and folders of job files expanded in order, each job run
//! in turn (a failing job does not stop the others), a stop request honoured between jobs.

use std::path::{Path, PathBuf};
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use super::run::{run_job, RunOptions, RunSummary};
use super::spec::JobSpec;
use crate::error::{Error, Result};

/// The job files named by `args`: files as given, folders as their `.toml` files sorted by name
/// (a folder without any stays in the list and fails as a job, so the user hears of it).
pub fn job_files(args: &[PathBuf]) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for a in args {
        if a.is_dir() {
            let mut found: Vec<PathBuf> = std::fs::read_dir(a)
                .map(|rd| {
                    rd.filter_map(|e| e.ok().map(|e| e.path()))
                        .filter(|p| p.extension().is_some_and(|x| x == "toml"))
                        .collect()
                })
                .unwrap_or_default();
            found.sort();
            if found.is_empty() {
                out.push(a.clone());
            }
            out.extend(found);
        } else {
            out.push(a.clone());
        }
    }
    out
}

/// Loads and runs one job file.
pub fn run_file(path: &Path, opts: &RunOptions) -> Result<RunSummary> {
    if path.is_dir() {
        return Err(Error::input(path, "folder holds no .toml job file"));
    }
    let spec = JobSpec::load(path)?;
    run_job(&spec, opts)
}

/// How a batch went.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct BatchOutcome {
    /// Jobs started.
    pub run: usize,
    /// Jobs that failed (an interrupted job counts as failed).
    pub failed: usize,
    /// A job was interrupted, or the batch stopped before its end.
    pub interrupted: bool,
}

/// Runs each job file in turn, calling `report` with each result and its wall time; stops
/// starting jobs once `opts.stop` is set.
pub fn run_batch(
    files: &[PathBuf],
    opts: &RunOptions,
    mut report: impl FnMut(&Path, &Result<RunSummary>, Duration),
) -> BatchOutcome {
    let mut out = BatchOutcome::default();
    for f in files {
        if opts.stop.load(Ordering::SeqCst) {
            out.interrupted = true;
            break;
        }
        let t0 = Instant::now();
        let res = run_file(f, opts);
        out.run += 1;
        if let Err(e) = &res {
            out.failed += 1;
            out.interrupted |= matches!(e, Error::Interrupted(_));
        }
        report(f, &res, t0.elapsed());
    }
    out
}

#[cfg(test)]
mod unit_tests {
    use super::*;
    use crate::job::ProgressMode;

    #[test]
    fn folders_expand_sorted_and_failures_do_not_stop_the_batch() {
        let d = tempfile::tempdir().unwrap();
        let jobs = d.path().join("jobs");
        std::fs::create_dir(&jobs).unwrap();
        std::fs::write(jobs.join("b.toml"), "not a job").unwrap();
        std::fs::write(jobs.join("a.toml"), "also not a job").unwrap();
        std::fs::write(jobs.join("notes.txt"), "").unwrap();
        let empty = d.path().join("empty");
        std::fs::create_dir(&empty).unwrap();
        let files = job_files(&[jobs.clone(), empty.clone(), d.path().join("x.toml")]);
        assert_eq!(
            files,
            vec![
                jobs.join("a.toml"),
                jobs.join("b.toml"),
                empty.clone(),
                d.path().join("x.toml")
            ]
        );
        let mut seen = Vec::new();
        let out = run_batch(&files, &RunOptions::new(ProgressMode::Quiet), |f, r, _| {
            seen.push((f.to_path_buf(), r.is_ok()))
        });
        assert_eq!(
            out,
            BatchOutcome {
                run: 4,
                failed: 4,
                interrupted: false
            }
        );
        assert_eq!(seen.len(), 4);
        let opts = RunOptions::new(ProgressMode::Quiet);
        opts.stop.store(true, Ordering::SeqCst);
        let out = run_batch(&files, &opts, |_, _, _| {});
        assert_eq!((out.run, out.interrupted), (0, true));
    }
}
