//! A lost node costs what it held, not the run: the pieces of the step's
//! starting state that no node holds any more are read again from the
//! run's packs (which name every piece they stored by content id), the
//! memo forgets the results that lived only on the lost node, and the step
//! runs again; every result still held elsewhere is found in the memo, so
//! only the lost work is done again. A roll back to the newest checkpoint
//! stays the last resort: for a piece no pack holds (made since the last
//! checkpoint and lost before it was stored), or nodes that cannot read
//! the run's storage.

use std::collections::HashSet;

use anyhow::Context;
use deeptime_engine::pack::QuadAt;
use deeptime_engine::{ContentId, KnownQuads};

use crate::cluster::drive::{OnNodes, Run, keep_for_next};
use crate::cluster::resume::packs_of;
use deeptime_storage::checkpoint::Manifest;

/// Rounds of reading lost pieces: a node that fails its read is left out
/// and its run goes to the others in the next round.
const READ_ATTEMPTS: usize = 3;

/// What a recovery did.
pub(super) enum Recovered {
    /// the pieces read again, from which checkpoint's packs
    Reloaded { pieces: usize, sequence: u64 },
    /// it could not: why (the run rolls back)
    No(String),
}

impl Run<'_> {
    /// Puts the lost pieces of `state` back on the live nodes from the
    /// packs of `newest`, and drops the memoised results that lived only on
    /// lost nodes.
    pub(super) async fn recover(
        &self,
        state: &OnNodes,
        newest: Option<&Manifest>,
        known: &KnownQuads,
    ) -> anyhow::Result<Recovered> {
        // A node that failed a call may be gone or only slow: only the
        // gone are counted out.
        self.tasks.lose_the_gone().await;
        let pieces = {
            let mut top = state.top.lock().expect("top");
            top.pieces(&state.root, state.level)
        };
        let missing: Vec<ContentId> = pieces
            .iter()
            .filter(|piece| !self.tasks.is_held(piece))
            .copied()
            .collect();
        if missing.is_empty() {
            return Ok(Recovered::No(
                "every piece of the state is still listed on a node".to_string(),
            ));
        }
        let Some(newest) = newest else {
            return Ok(Recovered::No("no checkpoint is stored yet".to_string()));
        };
        let mut at: Vec<(ContentId, QuadAt)> = Vec::with_capacity(missing.len());
        for piece in &missing {
            match known.get(piece) {
                Some(place) => at.push((*piece, *place)),
                None => {
                    return Ok(Recovered::No(format!(
                        "piece {} is in no pack of the run",
                        piece.short()
                    )));
                }
            }
        }
        let packs = packs_of(newest)?;
        // Runs of neighbouring pieces (in the order the state lists them),
        // one per live node, read by the nodes in parallel. A node that
        // fails its read (gone since the probe, or failing) is left out and
        // its run shared among the others, a few times over.
        let mut reads = Vec::new();
        let mut left: Vec<(ContentId, QuadAt)> = at.clone();
        let mut failed: HashSet<u64> = HashSet::new();
        let mut last_error = None;
        for _ in 0..READ_ATTEMPTS {
            if left.is_empty() {
                break;
            }
            let live: Vec<_> = self
                .members
                .live()
                .into_iter()
                .filter(|member| !failed.contains(&member.id))
                .collect();
            if live.is_empty() {
                break;
            }
            let share = left.len().div_ceil(live.len());
            let attempts = live.iter().zip(left.chunks(share)).map(|(member, run)| {
                let packs = &packs;
                async move {
                    let places: Vec<QuadAt> = run.iter().map(|(_, place)| *place).collect();
                    let read = self.load_call(member, packs, &places, false).await;
                    (member.id, run.to_vec(), read)
                }
            });
            let mut unread = Vec::new();
            for (member, run, read) in futures::future::join_all(attempts).await {
                match read {
                    Ok(read) => reads.push((member, run, read)),
                    Err(error) => {
                        failed.insert(member);
                        last_error = Some(error);
                        unread.extend(run);
                    }
                }
            }
            left = unread;
            if !left.is_empty() {
                // Those that failed and are gone are lost, not only skipped.
                self.tasks.lose_the_gone().await;
            }
        }
        if !left.is_empty() {
            let why = match last_error {
                Some(error) => format!("the nodes could not read the lost pieces: {error:#}"),
                None => "no node is live".to_string(),
            };
            return Ok(Recovered::No(why));
        }
        for (member, run, read) in reads {
            for ((expected, _), got) in run.iter().zip(read) {
                let (id, figures) = got.with_context(|| {
                    format!("node {member} read no piece where {} was", expected.short())
                })?;
                if id != *expected {
                    anyhow::bail!(
                        "node {member} read piece {} where the run stored {} (damaged pack)",
                        id.short(),
                        expected.short()
                    );
                }
                self.tasks.record_holding(id, member, figures);
            }
        }
        // Results whose pieces went with the lost node are forgotten; what
        // the nodes keep is the state and the memo that is left.
        let kept = {
            let mut top = state.top.lock().expect("top");
            top.memo_forget_unless(|top, result| {
                top.pieces_under_quads(&[result])
                    .iter()
                    .all(|piece| self.tasks.is_held(piece))
            });
            keep_for_next(&mut top, (state.root, state.level), &[])
        };
        self.tasks.retain(self.job_id, &kept).await?;
        Ok(Recovered::Reloaded {
            pieces: at.len(),
            sequence: newest.sequence,
        })
    }
}
