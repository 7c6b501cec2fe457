//! The node's side of membership: join the coordinator, renew the lease,
//! join again when told to or when the lease lapsed. A coordinator that
//! cannot be reached is retried with backoff, for ever; one that refuses
//! the token ends the node with a clear error.

use std::sync::Arc;
use std::time::Duration;

use deeptime_engine::shard::Shard;
use deeptime_proto::v1;
use tonic::Code;

use crate::auth::Token;
use crate::service::{JobTerms, NodeState};
use crate::wire::{self, TlsFiles};

/// Why a node stops.
#[derive(Debug, thiserror::Error)]
pub enum Refused {
    #[error("the coordinator at {0} refused this node's cluster token (check --token-file)")]
    Token(String),
    #[error("the coordinator at {url} refused this node: {message}")]
    Other { url: String, message: String },
}

const FIRST_BACKOFF: Duration = Duration::from_millis(200);
const MAX_BACKOFF: Duration = Duration::from_secs(5);

/// Joins and renews until the process ends; returns only when refused.
pub async fn keep_membership(
    state: Arc<NodeState>,
    url: String,
    advertise: String,
    token: Token,
    tls: TlsFiles,
) -> Result<(), Refused> {
    let endpoint = wire::endpoint(&url, &tls).map_err(|error| Refused::Other {
        url: url.clone(),
        message: error.to_string(),
    })?;
    let client = wire::coordinator_client(endpoint.connect_lazy(), &token);
    let mut backoff = FIRST_BACKOFF;
    let mut warned = false;
    loop {
        let join = v1::JoinRequest {
            address: advertise.clone(),
            memory: state.budget,
            version: env!("CARGO_PKG_VERSION").to_string(),
            checkpoint_dir: state
                .checkpoints
                .as_ref()
                .map(|c| c.location.clone())
                .unwrap_or_default(),
        };
        let reply = match client.clone().join(join).await {
            Ok(reply) => reply.into_inner(),
            Err(status) if status.code() == Code::Unauthenticated => {
                return Err(Refused::Token(url));
            }
            Err(status)
                if status.code() == Code::InvalidArgument
                    || status.code() == Code::PermissionDenied =>
            {
                return Err(Refused::Other {
                    url,
                    message: status.message().to_string(),
                });
            }
            Err(status) => {
                if !warned {
                    tracing::warn!(%url, reason = status.message(), "cannot reach the coordinator, retrying");
                    warned = true;
                }
                tokio::time::sleep(jitter(backoff)).await;
                backoff = (backoff * 2).min(MAX_BACKOFF);
                continue;
            }
        };
        backoff = FIRST_BACKOFF;
        warned = false;
        if let Err(message) = take_terms(&state, &reply) {
            return Err(Refused::Other { url, message });
        }
        tracing::info!(member = reply.member, job = %reply.job, shard_level = reply.shard_level, "joined");
        renew_until_lapsed(&state, &client, &reply).await?;
        tracing::warn!("the lease lapsed, joining again");
    }
}

/// Sets the node up for the job of a join reply (a new job drops the old
/// job's quads; the same job keeps them warm).
fn take_terms(state: &NodeState, reply: &v1::JoinReply) -> Result<(), String> {
    let terms = JobTerms {
        job: reply.job.clone(),
        shard_level: reply.shard_level,
    };
    let mut current = state.terms.lock().expect("terms");
    if current.as_ref() == Some(&terms) {
        return Ok(());
    }
    let rule = reply
        .rule
        .parse()
        .map_err(|error| format!("rule {:?}: {error}", reply.rule))?;
    let shard = Shard::new(rule, state.budget).map_err(|error| error.to_string())?;
    let mut guard = state.shard.lock().expect("shard");
    *guard = Some(shard);
    *state.spill.lock().expect("spill") = state
        .spill_to
        .as_ref()
        .map(|(storage, limit)| crate::spill::Spill::new(storage.clone(), *limit));
    drop(guard);
    *state.written.lock().expect("written") = Default::default();
    *current = Some(terms);
    Ok(())
}

async fn renew_until_lapsed(
    state: &NodeState,
    client: &wire::CoordinatorClient,
    reply: &v1::JoinReply,
) -> Result<(), Refused> {
    let every = Duration::from_millis(reply.renew_every_ms.clamp(50, 60_000));
    let mut missed = 0;
    // The first renewal goes at once: it tells the coordinator that this
    // node has taken the job's terms and can take tasks.
    let mut first = true;
    let mut last = (0, 0);
    loop {
        if !first {
            tokio::time::sleep(every).await;
        }
        first = false;
        // Never wait for the shard: a long task or pack holds it, and a
        // renewal that waited could let the lease lapse. When it is busy,
        // the last figures go again.
        if let Ok(guard) = state.shard.try_lock()
            && let Some(shard) = guard.as_ref()
        {
            let stats = shard.stats();
            last = (stats.quads, stats.bytes);
        }
        let (quads, bytes) = last;
        let renew = v1::RenewRequest {
            member: reply.member,
            quads,
            bytes,
        };
        match client.clone().renew(renew).await {
            Ok(answer) if answer.get_ref().member => missed = 0,
            Ok(_) => return Ok(()),
            Err(status) if status.code() == Code::Unauthenticated => {
                return Err(Refused::Token(String::from("the coordinator")));
            }
            Err(_) => {
                missed += 1;
                if missed >= 3 {
                    return Ok(());
                }
            }
        }
    }
}

/// A delay of 75–125% of `base`, so nodes do not retry in step.
fn jitter(base: Duration) -> Duration {
    let factor = 0.75 + rand::random::<f64>() * 0.5;
    base.mul_f64(factor)
}
