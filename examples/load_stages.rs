//! Time the stages of reading a file: header, polars read, validation.
//!
//! ```text
//! cargo run --release --example load_stages -- FILE
//! ```
use std::time::Instant;

fn main() {
    let path = std::path::PathBuf::from(std::env::args().nth(1).expect("FILE"));
    let names: Vec<String> = ["pupil", "age", "score"].iter().map(|s| s.to_string()).collect();
    for _ in 0..3 {
        let t = Instant::now();
        let h = braid::data::read::header(&path, b',').unwrap();
        let t_header = t.elapsed();
        let t = Instant::now();
        let table = braid::data::read::read_columns(&path, &names, &names[1..], b',').unwrap();
        let t_read = t.elapsed();
        let t = Instant::now();
        let polars = braid::data::read::read_columns_polars(&path, &names, &names[1..], b',').unwrap();
        let t_polars = t.elapsed();
        assert_eq!(table, polars);
        let roles = braid::data::Roles {
            id: "pupil".into(),
            age: "age".into(),
            outcome: "score".into(),
            ..Default::default()
        };
        let t = Instant::now();
        let panel = braid::data::load(&path, &roles, Default::default()).unwrap();
        let t_load = t.elapsed();
        println!(
            "header {t_header:?} ({} columns), read {t_read:?} ({} rows; polars alone {t_polars:?}), whole load {t_load:?} ({} rows)",
            h.len(),
            table.n_rows,
            panel.n()
        );
    }
}
