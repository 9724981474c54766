//! AFL++ target: see apportion_fuzz::check_engine_bytes for what is checked.
fn main() {
    afl::fuzz!(|data: &[u8]| {
        apportion_fuzz::check_engine_bytes(data);
    });
}
