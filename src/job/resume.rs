//! Resuming an interrupted run: finding its journal and checking it belongs to this job.

use std::path::Path;

use super::journal::{changed_key, Journal};
use super::spec::JobSpec;
use crate::error::{Error, Result};

/// Looks for an interrupted run of this output. Ok(Some(journal)) to continue; Ok(None) to start
/// afresh (no journal, or --restart); Err when the job changed and --restart was not given.
pub(super) fn find_resume(
    spec: &JobSpec,
    data: &Path,
    journal: &Path,
    shard: Option<[u32; 2]>,
    restart: bool,
    inputs: &[super::journal::InputHash],
) -> Result<Option<Journal>> {
    if restart {
        // Also when the journal itself is damaged: --restart is the way out.
        let _ = std::fs::remove_file(data);
        let _ = std::fs::remove_file(journal);
        return Ok(None);
    }
    let Some(j) = Journal::read(journal)? else {
        return Ok(None);
    };
    if j.job_sha256 != spec.sha256 {
        return Err(Error::job(
            &spec.path,
            format!(
                "changed since the interrupted run in {} ({}); run again with --restart to discard the partial work",
                journal.display(),
                changed_key(&j.job_toml, &spec.text)
            ),
        ));
    }
    if !j.inputs.is_empty() {
        // By position (the job file is unchanged, so its inputs are the same list), by content:
        // the same job started by another spelling of its path resumes.
        let changed = j.inputs.len() != inputs.len()
            || j.inputs
                .iter()
                .zip(inputs)
                .any(|(a, b)| a.sha256 != b.sha256);
        if let Some(old) = changed.then(|| {
            j.inputs
                .iter()
                .zip(inputs)
                .find(|(a, b)| a.sha256 != b.sha256)
                .map_or(&j.inputs[0], |(a, _)| a)
        }) {
            return Err(Error::job(
                &spec.path,
                format!(
                    "input {} changed since the interrupted run in {}; run again with --restart to discard the partial work",
                    old.file,
                    journal.display()
                ),
            ));
        }
    }
    if j.shard != shard {
        return Err(Error::job(
            &spec.path,
            format!(
                "{} belongs to another shard split; run with --restart",
                journal.display()
            ),
        ));
    }
    if j.fields.is_none() && !data.exists() {
        let _ = std::fs::remove_file(journal);
        return Ok(None);
    }
    Ok(Some(j))
}
