//! Regenerate the files under `fixtures/` (the README's `assess` examples and the CLI tests use them).
//!
//! ```text
//! cargo run --example make_fixtures [-- OUT_DIR]     # default: fixtures
//! ```
//!
//! Everything comes from the fictional recycling plant in `labelweir::scenario`, with fixed seeds, so the
//! output is the same on every run. Readings are rounded to four decimals to keep the files small.

use std::fs;
use std::path::{Path, PathBuf};

use labelweir::scenario::{self, class, Plant};
use ndarray::Array2;

/// Plant and sampling seeds (arbitrary, fixed).
const PLANT_SEED: u64 = 2026;

fn round(x: &Array2<f64>) -> Array2<f64> {
    x.mapv(|v| (v * 1e4).round() / 1e4)
}

fn write(
    dir: &Path,
    name: &str,
    prefix: &str,
    x: &Array2<f64>,
    y: &[usize],
) -> std::io::Result<()> {
    let ids = scenario::item_ids(prefix, y.len());
    let labels = scenario::label_names(y);
    let names = scenario::feature_names();
    let path = dir.join(name);
    if name.ends_with(".jsonl") {
        scenario::write_jsonl(&path, &ids, &labels, &names, round(x).view())
    } else {
        scenario::write_csv(&path, &ids, &labels, &names, round(x).view())
    }
}

/// The planted errors of a batch, for tests and the README: `truth/<batch>` with `id,true_label,
/// delivered_label,flipped`. labelweir never reads these.
fn truth(
    dir: &Path,
    batch: &str,
    prefix: &str,
    y: &[usize],
    delivered: &[usize],
) -> std::io::Result<()> {
    let t = dir.join("truth");
    fs::create_dir_all(&t)?;
    let mut out = String::from("id,true_label,delivered_label,flipped\n");
    for (i, id) in scenario::item_ids(prefix, y.len()).iter().enumerate() {
        out.push_str(&format!(
            "{id},{},{},{}\n",
            scenario::CLASS_NAMES[y[i]],
            scenario::CLASS_NAMES[delivered[i]],
            y[i] != delivered[i]
        ));
    }
    fs::write(t.join(batch), out)
}

fn main() -> std::io::Result<()> {
    let dir = PathBuf::from(std::env::args().nth(1).unwrap_or_else(|| "fixtures".into()));
    let bad = dir.join("bad");
    fs::create_dir_all(&bad)?;
    let plant = Plant::new(PLANT_SEED);

    // Trusted set: 10 expert-verified items per class.
    let (tx, ty) = plant.sample_per_class(10, 1);
    write(&dir, "trusted.csv", "trusted", &tx, &ty)?;
    // Accepted pool: 1,500 items from the belt, labels correct.
    let (px, py) = plant.sample(1500, 2);
    write(&dir, "pool.csv", "pool", &px, &py)?;

    // Batches of 300 items from one vendor delivery.
    let (bx, by) = plant.sample(300, 3);
    write(&dir, "batch-clean.csv", "acme-0001", &bx, &by)?;
    write(&dir, "batch-clean.jsonl", "acme-0001", &bx, &by)?;

    // Systematic: the 10% of items nearest one random item relabelled "paper" (Zhang, Zhu & Wright 2018).
    let (rx, ry) = plant.sample(300, 4);
    let (ry2, _) = scenario::region_flips(rx.view(), &ry, class::PAPER, 0.10, 40);
    write(&dir, "batch-region-flip.csv", "acme-0002", &rx, &ry2)?;
    truth(&dir, "batch-region-flip.csv", "acme-0002", &ry, &ry2)?;

    // Random: 10% of items moved to a random other class (Xiao, Xiao & Eckert 2012).
    let (ux, uy) = plant.sample(300, 5);
    let (uy2, _) = scenario::uniform_flips(&uy, 8, 0.10, 50);
    write(&dir, "batch-uniform-flip.csv", "acme-0003", &ux, &uy2)?;
    truth(&dir, "batch-uniform-flip.csv", "acme-0003", &uy, &uy2)?;

    // The vendor's error in the plant's terms: half of the wet cardboard labelled paper.
    let s = plant.sample_detailed(300, 6);
    let wet = plant
        .subpopulation_index("wet_cardboard")
        .expect("the plant has wet cardboard");
    let (sy2, _) =
        scenario::subpopulation_flips(&s.y, &s.subpopulation, &[wet], class::PAPER, 1.0, 60);
    write(
        &dir,
        "batch-wet-cardboard-as-paper.csv",
        "acme-0004",
        &s.x,
        &sy2,
    )?;
    truth(
        &dir,
        "batch-wet-cardboard-as-paper.csv",
        "acme-0004",
        &s.y,
        &sy2,
    )?;

    // The clean batch with the special columns renamed (for --id-column / --label-column).
    let clean = fs::read_to_string(dir.join("batch-clean.csv"))?;
    let renamed = clean.replacen("id,label,", "item,material,", 1);
    fs::write(dir.join("batch-renamed-columns.csv"), renamed)?;
    let trusted = fs::read_to_string(dir.join("trusted.csv"))?;
    let renamed = trusted.replacen("id,label,", "item,material,", 1);
    fs::write(dir.join("trusted-renamed-columns.csv"), renamed)?;

    // Malformed deliveries: each breaks exactly one rule, a few rows into a small valid batch.
    let (mx, my) = plant.sample(6, 7);
    let ids = scenario::item_ids("acme-0009", 6);
    let labels = scenario::label_names(&my);
    let names = scenario::feature_names();
    let mut buf = Vec::new();
    labelweir::data::write_csv(
        &mut buf,
        ("id", "label"),
        &ids,
        &labels,
        &names,
        round(&mx).view(),
    )?;
    let good = String::from_utf8(buf).expect("UTF-8");
    let lines: Vec<&str> = good.lines().collect();
    let header = lines[0];
    let join = |ls: &[String]| ls.join("\n") + "\n";
    let mut rows: Vec<String> = lines.iter().map(|s| s.to_string()).collect();

    fs::write(bad.join("empty.csv"), "")?;
    fs::write(bad.join("header-only.csv"), format!("{header}\n"))?;
    // Missing the label column.
    let no_label: Vec<String> = rows
        .iter()
        .map(|l| {
            let mut cells: Vec<&str> = l.split(',').collect();
            cells.remove(1);
            cells.join(",")
        })
        .collect();
    fs::write(bad.join("missing-column.csv"), join(&no_label))?;
    // An extra feature the trusted set does not have.
    let extra: Vec<String> = rows
        .iter()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                format!("{l},conveyor_speed")
            } else {
                format!("{l},2.5")
            }
        })
        .collect();
    fs::write(bad.join("extra-column.csv"), join(&extra))?;
    // Row 3, column weight_g: not a number.
    let mut non_numeric = rows.clone();
    non_numeric[3] = replace_cell(&non_numeric[3], header, "weight_g", "12,5g");
    fs::write(bad.join("non-numeric.csv"), join(&non_numeric))?;
    // Row 4 repeats row 2's id.
    let mut dup = rows.clone();
    dup[4] = replace_cell(&dup[4], header, "id", ids[1].as_str());
    fs::write(bad.join("duplicate-id.csv"), join(&dup))?;
    // Row 5's label is not a class of the trusted set.
    let mut unknown = rows.clone();
    unknown[5] = replace_cell(&unknown[5], header, "label", "styrofoam");
    fs::write(bad.join("unknown-label.csv"), join(&unknown))?;
    // Row 2 has a cell too few.
    let mut ragged = rows.clone();
    let cut = ragged[2].rfind(',').expect("a comma");
    ragged[2].truncate(cut);
    fs::write(bad.join("ragged-row.csv"), join(&ragged))?;
    // Row 6: NaN reading.
    rows[6] = replace_cell(&rows[6], header, "density_g_cm3", "NaN");
    fs::write(bad.join("nan-cell.csv"), join(&rows))?;
    // A JSON Lines batch whose second object is cut off.
    let mut jl = Vec::new();
    labelweir::data::write_jsonl(
        &mut jl,
        ("id", "label"),
        &ids[..2],
        &labels[..2],
        &names,
        round(&mx).slice(ndarray::s![..2, ..]),
    )?;
    let mut jl = String::from_utf8(jl).expect("UTF-8");
    let cut = jl.trim_end().len() - 40;
    jl.truncate(cut);
    jl.push('\n');
    fs::write(bad.join("truncated.jsonl"), jl)?;
    println!("wrote fixtures to {}", dir.display());
    Ok(())
}

/// `line` (a CSV row without quoted commas) with the cell under `column` replaced by `value`, quoted when
/// it holds a comma.
fn replace_cell(line: &str, header: &str, column: &str, value: &str) -> String {
    let col = header
        .split(',')
        .position(|h| h == column)
        .expect("known column");
    let mut cells: Vec<String> = line.split(',').map(str::to_owned).collect();
    cells[col] = if value.contains(',') {
        format!("\"{value}\"")
    } else {
        value.to_owned()
    };
    cells.join(",")
}
