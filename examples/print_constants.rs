//! Prints the computed control-chart constants for subgroup sizes 2..=25 (or up to the size
//! given as the first argument), for comparison with printed tables.
fn main() {
    let max: usize = std::env::args()
        .nth(1)
        .and_then(|a| a.parse().ok())
        .unwrap_or(25);
    println!(
        "  n     d2      d3      c4      A2     A3     B3     B4     B5     B6     D1     D2     D3     D4     E2"
    );
    for n in 2..=max {
        let f = linewarden::stats::factors(n).expect("sizes 2..=100 are supported");
        println!(
            "{:>3} {:.4} {:.4} {:.4} {:.3} {:.3} {:.3} {:.3} {:.3} {:.3} {:.3} {:.3} {:.3} {:.3} {:.3}",
            n, f.d2, f.d3, f.c4, f.A2, f.A3, f.B3, f.B4, f.B5, f.B6, f.D1, f.D2, f.D3, f.D4, f.E2
        );
    }
}
