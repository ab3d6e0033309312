//! Why the daemon could not start: the one error type of start-up, shared by the service and
//! the `--threads` engine. Only start-up failures are errors; everything after is counted.

/// Why the daemon could not start. (Causes are part of the message, not separate sources, so
/// an error chain names them once.)
#[derive(Debug, thiserror::Error)]
pub enum StartError {
    /// The model file could not be loaded.
    #[error(transparent)]
    Model(#[from] auspex_proto::model_file::ModelLoadError),
    /// The model file could not be read again for its checksum (shards and combiner).
    #[error("{path}: cannot read the model file: {cause}")]
    ModelRead {
        /// The file.
        path: std::path::PathBuf,
        /// The cause.
        cause: std::io::Error,
    },
    /// A socket could not be bound (address in use, bad interface, no permission…).
    #[error(
        "cannot bind {socket} endpoint {endpoint}: {cause}{}",
        bind_hint(socket, cause)
    )]
    Bind {
        /// Which socket (ingest, task ingest, publish, control, link).
        socket: &'static str,
        /// The endpoint as configured.
        endpoint: String,
        /// The cause.
        cause: zeromq::ZmqError,
    },
    /// The session recording could not be created.
    #[error("{path}: cannot create the session recording: {cause}")]
    Recording {
        /// The file.
        path: std::path::PathBuf,
        /// The cause.
        cause: std::io::Error,
    },
    /// The model's held-out record cannot support the target accuracy.
    #[error("{model}: target accuracy {target}: {reason}")]
    Promise {
        /// The model file.
        model: String,
        /// The target asked for.
        target: f64,
        /// Why not.
        reason: String,
    },
    /// Learning cannot work with these settings.
    #[error("learning: {0}")]
    Learning(String),
    /// The engine refused the model or settings.
    #[error("{model}: {cause}")]
    Engine {
        /// The model file.
        model: String,
        /// The cause.
        cause: auspex_engine::engine::EngineError,
    },
    /// A thread or runtime task could not be started.
    #[error("cannot start the {what}: {cause}")]
    Spawn {
        /// The engine or learner thread, or the ingest socket's subscription.
        what: &'static str,
        /// The cause.
        cause: String,
    },
}

/// What to do about a bind failure: an address in use is most often another daemon.
fn bind_hint(socket: &str, cause: &zeromq::ZmqError) -> String {
    let text = cause.to_string().to_ascii_lowercase();
    if text.contains("in use") {
        let flag = match socket {
            "ingest" => "--ingest",
            "task ingest" => "--task-ingest",
            "publish" => "--publish",
            "control" => "--control",
            _ => "the endpoint's flag",
        };
        format!(
            " — another daemon may be running (`auspex status` asks the default one; stop it, or give this one other ports with {flag} and the other endpoint flags)"
        )
    } else {
        String::new()
    }
}
