//! Compiles the schemas in proto/ with protox (pure Rust), so no system `protoc` is needed.
fn main() -> Result<(), Box<dyn std::error::Error>> {
    let files = [
        "proto/auspex/v1/model.proto",
        "proto/auspex/v1/wire.proto",
        "proto/auspex/v1/session.proto",
    ];
    for f in &files {
        println!("cargo:rerun-if-changed={f}");
    }
    let fds = protox::compile(files, ["proto"])?;
    prost_build::Config::new()
        // Rare and large: kept out of line so every record stays small.
        .boxed(".auspex.v1.SessionRecord.choice")
        .compile_fds(fds)?;
    Ok(())
}
