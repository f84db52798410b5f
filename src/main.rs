//! The `holdfast` command line.
fn main() {}
