//! # auspex-proto
//!
//! The wire and file schemas of Auspex (`proto/auspex/v1/*.proto`, compiled by prost through
//! protox at build time), and the byte codecs for model files and session recordings.
//! Codecs work on bytes and treat "incomplete" as a normal answer, not an error.
//! `stream` applies inbound messages to the engine: the one rule the daemon and offline replay
//! share.
//! Must not: open sockets, read files or clocks.
#![deny(missing_docs)]

/// Generated protobuf types (package `auspex.v1`).
#[allow(missing_docs, clippy::all)]
pub mod v1 {
    include!(concat!(env!("OUT_DIR"), "/auspex.v1.rs"));
}

pub mod civil;
pub mod convert;
pub mod crc32;
pub mod model_file;
pub mod recording;
pub mod session;
pub mod stream;

use prost::Message;

/// Magic prefix of a model file.
pub const MODEL_MAGIC: &[u8; 8] = b"APXMODEL";
/// Model file format version this build writes and reads.
pub const MODEL_FORMAT_VERSION: u32 = 1;
/// The daemon's default endpoints: loopback only (the daemon and the client both use these).
pub mod endpoints {
    /// Main ingest.
    pub const INGEST: &str = "tcp://127.0.0.1:7710";
    /// Task-control ingest.
    pub const TASK_INGEST: &str = "tcp://127.0.0.1:7711";
    /// Publish.
    pub const PUBLISH: &str = "tcp://127.0.0.1:7712";
    /// Control.
    pub const CONTROL: &str = "tcp://127.0.0.1:7713";
    /// A shard's link to its combiner.
    pub const LINK: &str = "tcp://127.0.0.1:7714";
}

/// Topics on the publish socket.
pub mod topic {
    /// Posterior frames.
    pub const POSTERIOR: &str = "posterior";
    /// Decisions.
    pub const DECISION: &str = "decision";
    /// Per-unit reports.
    pub const UNITS: &str = "units";
    /// Trial ends.
    pub const TRIAL: &str = "trial";
    /// Health, once a second.
    pub const HEALTH: &str = "health";
    /// Session summaries, when a session ends.
    pub const SESSION: &str = "session";
    /// All topics.
    pub const ALL: [&str; 6] = [POSTERIOR, DECISION, UNITS, TRIAL, HEALTH, SESSION];
}

/// Why bytes are not a valid model file.
#[derive(Debug, thiserror::Error)]
pub enum ModelFileError {
    /// Missing magic prefix.
    #[error("not an Auspex model file (missing the APXMODEL prefix)")]
    NotAModel,
    /// Protobuf decoding failed (the cause is part of the message, not a separate source, so
    /// error chains print it once).
    #[error("model file is damaged ({0}); was it copied completely?")]
    Decode(prost::DecodeError),
    /// Unknown version.
    #[error("model file format version {0} is not supported by this build (supports {MODEL_FORMAT_VERSION})")]
    Version(u32),
}

impl From<prost::DecodeError> for ModelFileError {
    fn from(e: prost::DecodeError) -> Self {
        ModelFileError::Decode(e)
    }
}

/// Encodes a model file (magic + message).
pub fn encode_model_file(m: &v1::ModelFile) -> Vec<u8> {
    let mut out = Vec::with_capacity(8 + m.encoded_len());
    out.extend_from_slice(MODEL_MAGIC);
    m.encode(&mut out).expect("Vec grows as needed");
    out
}

/// Decodes a model file.
pub fn decode_model_file(bytes: &[u8]) -> Result<v1::ModelFile, ModelFileError> {
    let body = bytes
        .strip_prefix(MODEL_MAGIC.as_slice())
        .ok_or(ModelFileError::NotAModel)?;
    let m = v1::ModelFile::decode(body)?;
    if m.format_version != MODEL_FORMAT_VERSION {
        return Err(ModelFileError::Version(m.format_version));
    }
    Ok(m)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        #[test]
        fn inbound_round_trips(seq in any::<u64>(), units in proptest::collection::vec(any::<u32>(), 0..50), wm in any::<i64>()) {
            let ticks: Vec<i64> = units.iter().map(|&u| u as i64 * 3).collect();
            let m = v1::Inbound {
                sender: "acq".into(),
                seq,
                body: Some(v1::inbound::Body::Spikes(v1::SpikeBatch { units: units.clone(), ticks, complete_through: wm })),
            };
            let bytes = m.encode_to_vec();
            prop_assert_eq!(v1::Inbound::decode(bytes.as_slice()).unwrap(), m);
        }

        #[test]
        fn decoding_garbage_never_panics(bytes in proptest::collection::vec(any::<u8>(), 0..200)) {
            let _ = v1::Inbound::decode(bytes.as_slice());
            let _ = decode_model_file(&bytes);
        }
    }

    #[test]
    fn model_file_checks_magic_and_version() {
        let m = v1::ModelFile {
            format_version: 1,
            bin_width_s: 0.001,
            ..Default::default()
        };
        let b = encode_model_file(&m);
        assert_eq!(decode_model_file(&b).unwrap(), m);
        assert!(matches!(
            decode_model_file(&b[1..]),
            Err(ModelFileError::NotAModel)
        ));
        let m2 = v1::ModelFile {
            format_version: 99,
            ..Default::default()
        };
        assert!(matches!(
            decode_model_file(&encode_model_file(&m2)),
            Err(ModelFileError::Version(99))
        ));
    }
}
