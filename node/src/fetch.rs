//! Fetching quads a task needs from the peers that hold them: only what
//! this node lacks, level by level (a record names its children; those not
//! here are asked for next), batched per peer, every record checked
//! against its id and level.

use std::collections::{HashMap, HashSet};
use std::sync::{Arc, Mutex};

use deeptime_engine::ContentId;
use deeptime_engine::shard::{Record, Shard};
use deeptime_proto::v1;
use tonic::Status;
use tonic::transport::Channel;

use crate::auth::Token;
use crate::wire::{self, MAX_BATCH, NodeClient, TlsFiles};

/// Clients of peers, made once per address.
pub struct Peers {
    token: Token,
    tls: TlsFiles,
    channels: Mutex<HashMap<String, Channel>>,
}

impl Peers {
    pub fn new(token: Token, tls: TlsFiles) -> Peers {
        Peers {
            token,
            tls,
            channels: Mutex::new(HashMap::new()),
        }
    }

    /// A client of the node at `address` (connected lazily).
    pub fn client(&self, address: &str) -> Result<NodeClient, Status> {
        let mut channels = self.channels.lock().expect("peer map");
        if let Some(channel) = channels.get(address) {
            return Ok(wire::node_client(channel.clone(), &self.token));
        }
        let endpoint = wire::endpoint(address, &self.tls)
            .map_err(|error| Status::invalid_argument(format!("peer address: {error}")))?;
        let channel = endpoint.connect_lazy();
        channels.insert(address.to_string(), channel.clone());
        Ok(wire::node_client(channel, &self.token))
    }
}

/// What a fetch brought: records in an order that puts children first.
pub struct Fetched {
    pub records: Vec<(ContentId, Record)>,
    /// bytes of the replies, as encoded on the wire
    pub bytes: u64,
    /// fetch calls made, one after another
    pub calls: u64,
    /// the quads found here instead, kept until given back (`Here`)
    pub found: Vec<ContentId>,
}

/// Where a fetch looks before it asks the peers.
pub trait Here: Send + Sync + 'static {
    /// Which of `ids` are not here (called on a blocking thread); those
    /// that are may be kept here until `give_back`.
    fn lacking(&self, ids: &[ContentId]) -> Result<Vec<bool>, Status>;

    /// Lets go of what `lacking` found here and kept.
    fn give_back(&self, _ids: &[ContentId]) {}
}

impl Here for Mutex<Option<Shard>> {
    fn lacking(&self, ids: &[ContentId]) -> Result<Vec<bool>, Status> {
        let guard = self.lock().expect("shard");
        let shard = guard
            .as_ref()
            .ok_or_else(|| Status::failed_precondition("this node has not joined a job"))?;
        Ok(ids.iter().map(|id| !shard.has(id)).collect())
    }
}

/// Fetches the subtrees of `wanted` (id, level, sources) that are not
/// `here`.
pub async fn fetch_missing(
    here: Arc<dyn Here>,
    peers: &Peers,
    wanted: Vec<(ContentId, u32, Vec<String>)>,
) -> Result<Fetched, Status> {
    let mut got: HashMap<ContentId, Record> = HashMap::new();
    let mut bytes = 0u64;
    let mut calls = 0u64;
    // On a blocking thread: a task may hold the shard for long, and an
    // async worker waiting on it could not run the lease renewals.
    let lacks = |ids: Vec<(ContentId, u32, Vec<String>)>| {
        let here = here.clone();
        async move {
            tokio::task::spawn_blocking(move || -> Result<(Vec<_>, Vec<ContentId>), Status> {
                let just: Vec<ContentId> = ids.iter().map(|(id, _, _)| *id).collect();
                let lacking = here.lacking(&just)?;
                let found = just
                    .iter()
                    .zip(&lacking)
                    .filter(|(_, lacks)| !**lacks)
                    .map(|(id, _)| *id)
                    .collect();
                let lacked = ids
                    .into_iter()
                    .zip(lacking)
                    .filter(|(_, lacks)| *lacks)
                    .map(|(wanted, _)| wanted)
                    .collect();
                Ok((lacked, found))
            })
            .await
            .map_err(|error| Status::internal(format!("a lookup failed: {error}")))?
        }
    };
    let mut found: Vec<ContentId> = Vec::new();
    let fetched = async {
        let (mut round, here_now) = lacks(wanted).await?;
        found.extend(here_now);
        let mut asked: HashSet<ContentId> = HashSet::new();
        while !round.is_empty() {
            // One batch per source list (the ids a peer is asked for together).
            let mut by_sources: HashMap<Vec<String>, Vec<(ContentId, u32)>> = HashMap::new();
            for (id, level, sources) in round {
                if got.contains_key(&id) || !asked.insert(id) {
                    continue;
                }
                by_sources.entry(sources).or_default().push((id, level));
            }
            let mut next = Vec::new();
            for (sources, ids) in by_sources {
                for batch in ids.chunks(MAX_BATCH) {
                    let (records, size) = fetch_batch(peers, &sources, batch).await?;
                    bytes += size;
                    calls += 1;
                    for ((id, level), record) in batch.iter().zip(records) {
                        if record.level() != *level {
                            return Err(Status::data_loss(format!(
                                "a peer sent quad {id} as level {}, expected {level}",
                                record.level()
                            )));
                        }
                        if let Record::Inner { level, kids } = record {
                            for kid in kids {
                                next.push((kid, level - 1, sources.clone()));
                            }
                        }
                        got.insert(*id, record);
                    }
                }
            }
            let (lacked, here_now) = lacks(next).await?;
            found.extend(here_now);
            round = lacked;
        }
        Ok(())
    }
    .await;
    if let Err(status) = fetched {
        let here = here.clone();
        let _ = tokio::task::spawn_blocking(move || here.give_back(&found)).await;
        return Err(status);
    }
    // Children first: lower levels first.
    let mut records: Vec<(ContentId, Record)> = got.into_iter().collect();
    records.sort_by_key(|(_, record)| record.level());
    Ok(Fetched {
        records,
        bytes,
        calls,
        found,
    })
}

/// One batch from the first source that answers with every record.
async fn fetch_batch(
    peers: &Peers,
    sources: &[String],
    batch: &[(ContentId, u32)],
) -> Result<(Vec<Record>, u64), Status> {
    let request = v1::FetchRequest {
        ids: batch.iter().map(|(id, _)| id.0.to_vec()).collect(),
    };
    // ABORTED, not UNAVAILABLE: the caller is fine, a peer it was sent to
    // is not (the coordinator retries, and finds the peer lost in time).
    let mut last = Status::aborted("no peer holds the quads this task needs");
    for address in sources {
        let mut client = peers.client(address)?;
        match client.fetch(request.clone()).await {
            Ok(reply) => {
                let reply = reply.into_inner();
                let size = prost::Message::encoded_len(&reply) as u64;
                let mut records = Vec::with_capacity(batch.len());
                let mut by_id: HashMap<ContentId, Record> = HashMap::new();
                for wire_record in &reply.records {
                    let (id, record) = wire::record_from_wire(wire_record)?;
                    by_id.insert(id, record);
                }
                let complete = batch.iter().all(|(id, _)| by_id.contains_key(id));
                if !complete {
                    last =
                        Status::aborted(format!("peer {address} lacks quads it was said to hold"));
                    continue;
                }
                for (id, _) in batch {
                    records.push(by_id[id]);
                }
                return Ok((records, size));
            }
            Err(status) => last = Status::aborted(format!("peer {address}: {}", status.message())),
        }
    }
    Err(last)
}
