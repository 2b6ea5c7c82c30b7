//! Write the columns of braid's exact-value APC model for a file of records,
//! beside its age, calendar time and outcome, so that a general-purpose
//! least-squares routine can refit the same model
//! (tests/reference/apc_exact_reference.py does).
//!
//! ```text
//! cargo run --release --example apc_exact_basis -- DATA AGE PERIOD OUTCOME OUT.csv
//! ```

use std::fmt::Write;

use braid::apc::exact::{ExactInput, basis};
use braid::data::{ReadOptions, numeric_table};

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let a: Vec<String> = std::env::args().skip(1).collect();
    let [data, age, period, outcome, out] = a.as_slice() else {
        return Err("usage: apc_exact_basis DATA AGE PERIOD OUTCOME OUT.csv".into());
    };
    let t = numeric_table(
        std::path::Path::new(data),
        &[("age", age), ("period", period), ("outcome", outcome)],
        ReadOptions::default(),
    )?;
    let input = ExactInput::records(&t.columns[0], &t.columns[1], &t.columns[2]);
    let (names, rows) = basis(&input);
    let mut s = format!("age,period,outcome,{}\n", names.join(","));
    for (k, row) in rows.iter().enumerate() {
        let _ = write!(s, "{},{},{}", t.columns[0][k], t.columns[1][k], t.columns[2][k]);
        for v in row {
            let _ = write!(s, ",{v:e}");
        }
        s.push('\n');
    }
    std::fs::write(out, s)?;
    println!("wrote {} rows and {} model columns to {out}", rows.len(), names.len());
    Ok(())
}
