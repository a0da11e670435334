//! The `fringemill` binary: parses the command line, hands over to the library, and turns the
//! outcome into messages and an exit code.
//! Exit codes: 0 success, 1 a job failed, 2 usage error, 130 interrupted (work saved to continue).

mod cli;

use std::path::Path;
use std::process::ExitCode;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use clap::Parser;
use fringemill::job::{self, JobSpec, ProgressMode, RunOptions, RunSummary};
use fringemill::replay;

fn main() -> ExitCode {
    let t_start = Instant::now();
    let cli = match cli::Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    if let Some(n) = cli.common.threads {
        if let Err(e) = rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build_global()
        {
            eprintln!("fringemill: error: thread pool: {e}");
            return ExitCode::from(2);
        }
    }
    let progress = if cli.common.quiet {
        ProgressMode::Quiet
    } else if cli.common.log_progress {
        ProgressMode::Log
    } else {
        ProgressMode::Auto
    };
    let stop = Arc::new(AtomicBool::new(false));
    {
        let stop = stop.clone();
        // First Ctrl-C / SIGTERM: finish the band in flight and checkpoint; a second one ends at once.
        let _ = ctrlc::set_handler(move || {
            if stop.swap(true, Ordering::SeqCst) {
                std::process::exit(130);
            }
            eprintln!(
                "fringemill: stopping after the band in flight (Ctrl-C again to quit at once)"
            );
        });
    }
    let mut opts = RunOptions::new(progress);
    opts.stop = stop;
    let common = &cli.common;
    match cli.command {
        cli::Command::Run {
            jobs,
            restart,
            shard,
            checkpoint_secs,
        } => {
            opts.restart = restart;
            opts.shard = shard;
            opts.checkpoint_every = checkpoint_secs;
            run(&jobs, &opts, common)
        }
        cli::Command::Assemble { job } => {
            let t0 = Instant::now();
            let res = JobSpec::load(&job).and_then(|s| job::assemble(&s, &opts));
            report(&job, &res, common, t0.elapsed());
            match res {
                Ok(_) => ExitCode::SUCCESS,
                Err(fringemill::Error::Interrupted(_)) => ExitCode::from(130),
                Err(_) => ExitCode::from(1),
            }
        }
        cli::Command::Reconstruct(args) => reconstruct(args.into_request(), common, t_start),
        cli::Command::Sample { job, out } => {
            match JobSpec::load(&job).and_then(|s| job::scene::sample(&s, &out)) {
                Ok(n) => {
                    eprintln!("fringemill: wrote {n} emitters to {}", out.display());
                    println!("{}", out.display());
                    ExitCode::SUCCESS
                }
                Err(e) => fail(&e),
            }
        }
        cli::Command::Plan { job } => match JobSpec::load(&job).and_then(|s| job::plan(&s)) {
            Ok(r) => {
                for l in r.lines {
                    println!("{l}");
                }
                ExitCode::SUCCESS
            }
            Err(e) => fail(&e),
        },
    }
}

/// `run`: the batch of job files (folders expanded), a summary line for several, the exit code
/// (130 when interrupted, 1 when any failed).
fn run(jobs: &[std::path::PathBuf], opts: &RunOptions, common: &cli::Common) -> ExitCode {
    let files = job::batch::job_files(jobs);
    let out = job::batch::run_batch(&files, opts, |f, r, t| report(f, r, common, t));
    if files.len() > 1 {
        let skipped = files.len() - out.run;
        eprintln!(
            "fringemill: {} job(s): {} succeeded, {} failed{}",
            files.len(),
            out.run - out.failed,
            out.failed,
            if skipped > 0 {
                format!(", {skipped} not started")
            } else {
                String::new()
            }
        );
    }
    if out.interrupted {
        ExitCode::from(130)
    } else if out.failed > 0 {
        ExitCode::from(1)
    } else {
        ExitCode::SUCCESS
    }
}

/// `reconstruct`: the files written on stdout, statistics on request.
fn reconstruct(
    req: replay::ReconstructRequest,
    common: &cli::Common,
    t_start: Instant,
) -> ExitCode {
    match replay::reconstruct(&req) {
        Ok(files) => {
            if common.stats {
                eprintln!(
                    "fringemill: stats: reconstruct {}: {:.3} s, {} file(s) written, peak memory {}",
                    req.tif.display(),
                    t_start.elapsed().as_secs_f64(),
                    files.len(),
                    peak_memory()
                );
            }
            for f in files {
                println!("{}", f.display());
            }
            ExitCode::SUCCESS
        }
        Err(e) => fail(&e),
    }
}

/// The one-line error and exit code 1.
fn fail(e: &fringemill::Error) -> ExitCode {
    eprintln!("fringemill: error: {e}");
    ExitCode::from(1)
}

fn peak_memory() -> String {
    job::progress::peak_rss_bytes()
        .map(|b| format!("{:.1} MiB", b as f64 / 1048576.0))
        .unwrap_or_else(|| "unknown".into())
}

/// What a finished (or failed) job prints: its plate's path on stdout, a summary and the
/// optional statistics on stderr.
fn report(f: &Path, res: &fringemill::Result<RunSummary>, common: &cli::Common, took: Duration) {
    match res {
        Ok(s) => {
            if common.stats {
                let el = took.as_secs_f64();
                eprintln!(
                    "fringemill: stats: {}: {:.3} s, {} point-pixel updates, {:.3} G updates/s, peak memory {}",
                    f.display(),
                    el,
                    s.updates,
                    s.updates as f64 / el / 1e9,
                    peak_memory()
                );
            }
            if !common.quiet {
                eprintln!(
                    "fringemill: {}: wrote {} and {} ({} emitters, {} point-pixel updates)",
                    f.display(),
                    s.tiff.display(),
                    s.sidecar.display(),
                    s.emitters,
                    s.updates
                );
            }
            println!("{}", s.tiff.display());
        }
        Err(e) => eprintln!("fringemill: error: {e}"),
    }
}
