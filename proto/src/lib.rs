//! The deeptime cluster's wire protocol: the types and services of
//! `deeptime.cluster.v1`, generated at build time from
//! `proto/deeptime/cluster/v1/cluster.proto` (which documents every field).
//! No logic lives here.

/// Package `deeptime.cluster.v1`.
pub mod v1 {
    #![allow(clippy::all, missing_docs)]
    tonic::include_proto!("deeptime.cluster.v1");
}

/// The encoded descriptor set of the protocol (for reflection and tools).
pub const DESCRIPTOR_SET: &[u8] = tonic::include_file_descriptor_set!("cluster_descriptor");
