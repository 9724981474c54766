//! Compiles proto/apportion/v1/apportion.proto with a pure-Rust schema
//! compiler (protox), so building needs no `protoc` binary. The generated
//! code and the encoded FileDescriptorSet go to OUT_DIR.

use std::path::PathBuf;

use prost::Message;

fn main() {
    let manifest = PathBuf::from(std::env::var_os("CARGO_MANIFEST_DIR").expect("CARGO_MANIFEST_DIR"));
    let proto_root = manifest.join("../../proto");
    let file = "apportion/v1/apportion.proto";
    println!("cargo:rerun-if-changed={}", proto_root.join(file).display());

    let fds = match protox::compile([file], [&proto_root]) {
        Ok(fds) => fds,
        Err(e) => panic!("compiling {file}: {e:?}"),
    };
    let out = PathBuf::from(std::env::var_os("OUT_DIR").expect("OUT_DIR"));
    std::fs::write(out.join("apportion_v1_descriptor.bin"), fds.encode_to_vec()).expect("write descriptor set");
    prost_build::Config::new().compile_fds(fds).expect("prost-build");
}
