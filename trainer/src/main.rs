//! `keel`: the host command line.
fn main() {
    println!("keel: host tools (in progress)");
}
