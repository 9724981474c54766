//! AFL++ target: see apportion_fuzz::check_event_protobuf for what is checked.
fn main() {
    afl::fuzz!(|data: &[u8]| {
        apportion_fuzz::check_event_protobuf(data);
    });
}
