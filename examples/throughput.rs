//! Daemon throughput: `cargo run --release --example throughput [BATCHES] [ITEMS] [POOL]`.
//!
//! Prints sustained items per second through the whole path (claim, parse, score, decide, persist,
//! notice) and the latency per stage. Measured, never asserted.

fn main() {
    let mut o = labelweir::eval::throughput::Options::default();
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    if let Some(b) = args.first() {
        o.batches = *b;
    }
    if let Some(i) = args.get(1) {
        o.items = *i;
    }
    if let Some(p) = args.get(2) {
        o.pool = *p;
    }
    match labelweir::eval::throughput::run(&o) {
        Ok(r) => print!("{r}"),
        Err(e) => {
            eprintln!("throughput: {e}");
            std::process::exit(1);
        }
    }
}
