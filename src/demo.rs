//! The bundled demo scenario, invented from scratch: a regional bakery
//! chain that uploads each night's sales per shop and bread line.
//!
//! A chain of 108 shops sells twelve bread lines. Twenty-four nights are
//! generated from one seed. Night 5 carries a few bad rows (the file is
//! refused whole), night 7 is the first night of a new shop, from night 10
//! on demand in the town of Corrin shifts up after a competitor closes, and
//! the upload of night 9 is sent twice. From night 13 a heatwave lifts every
//! shop's temperature by 18 °C for eleven nights; for its first five nights
//! a strike at the flour mill halves what the shops can bake, so sales fall
//! by half for a reason no column records. A model that learns "heat halves
//! sales" from those nights is genuinely worse once the flour is back
//! (night 18) while the heat goes on: the designed regression.
//! `examples/gen_demo_data.rs` writes these files to `demo-data/`; a test
//! checks the committed files are exactly what this module generates.

use std::fmt::Write;

use crate::rng::Rng;

/// Seed of the committed demo files.
pub const SEED: u64 = 20_260_302;

const TOWNS: [&str; 12] = [
    "Ashby",
    "Brackwell",
    "Corrin",
    "Dunmore",
    "Elstead",
    "Farrow",
    "Glenholm",
    "Harwick",
    "Iverly",
    "Kestle",
    "Lowmoor",
    "Marden",
];
const STREETS: [&str; 9] = [
    "Market St",
    "Quay",
    "Station Rd",
    "High St",
    "Mill Lane",
    "Church Sq",
    "Bridge End",
    "Old Road",
    "Green Row",
];
/// Bread lines and their typical daily sales per shop.
const BREADS: [(&str, f64); 12] = [
    ("white tin", 62.0),
    ("wholemeal", 41.0),
    ("sourdough", 33.0),
    ("rye", 14.0),
    ("seeded", 27.0),
    ("baguette", 38.0),
    ("bloomer", 29.0),
    ("spelt", 11.0),
    ("brioche", 18.0),
    ("ciabatta", 22.0),
    ("soda bread", 9.0),
    ("milk roll", 25.0),
];
const WEEKDAYS: [&str; 7] = ["Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun"];
const WEEKDAY_FACTOR: [f64; 7] = [0.92, 0.88, 0.93, 0.97, 1.08, 1.32, 0.84];
const NEW_SHOP: &str = "Harwick Harbour";
const SHIFT_TOWN: &str = "Corrin";
pub const NIGHTS: usize = 24;
/// First night of the new shop, 1-based.
pub const NEW_SHOP_NIGHT: usize = 7;
/// First night with shifted demand, 1-based.
pub const SHIFT_NIGHT: usize = 10;
/// First night of the heatwave, 1-based.
pub const HEAT_NIGHT: usize = 13;
/// First night after the heatwave, 1-based.
pub const HEAT_END_NIGHT: usize = 24;
/// First night after the flour shortage (which starts with the heat), 1-based.
pub const SHORTAGE_END_NIGHT: usize = 18;
/// Night whose file has bad rows, 1-based.
pub const BAD_NIGHT: usize = 5;
/// Night whose file is sent twice, 1-based.
pub const RESENT_NIGHT: usize = 9;

/// The shops open on the first night: one in each town on each street.
fn shops() -> Vec<String> {
    TOWNS
        .iter()
        .flat_map(|t| STREETS.iter().map(move |s| format!("{t} {s}")))
        .collect()
}

struct ShopState {
    name: String,
    scale: f64,
    warmth: f64,
    prev: Vec<Option<f64>>,
}

impl ShopState {
    /// A shop is named after its town and street.
    fn town(&self) -> &str {
        self.name.split(' ').next().unwrap_or(&self.name)
    }
}

/// The demo files in publishing order: (file name, CSV text).
pub fn files(seed: u64) -> Vec<(String, String)> {
    let mut rng = Rng::new(seed);
    let mut shop_states: Vec<ShopState> = shops()
        .into_iter()
        .map(|name| ShopState {
            name,
            scale: 0.0,
            warmth: 0.0,
            prev: vec![None; BREADS.len()],
        })
        .collect();
    for s in &mut shop_states {
        s.scale = 0.6 + 0.9 * rng.uniform();
        s.warmth = 0.5 + rng.uniform();
    }
    let mut out = Vec::new();
    // Nights start on Monday 2 March 2026.
    for night in 1..=NIGHTS {
        if night == NEW_SHOP_NIGHT {
            shop_states.push(ShopState {
                name: NEW_SHOP.into(),
                scale: 1.3,
                warmth: 1.2,
                prev: vec![None; BREADS.len()],
            });
        }
        let day = night - 1;
        let weekday = day % 7;
        let season = (day as f64 / 40.0).sin();
        let hot = (HEAT_NIGHT..HEAT_END_NIGHT).contains(&night);
        // The mill's strike: shops bake half their usual loaves, and
        // nothing in the file says so.
        let supply = if (HEAT_NIGHT..SHORTAGE_END_NIGHT).contains(&night) {
            0.5
        } else {
            1.0
        };
        let temp = 9.0 + 6.0 * season + 3.0 * rng.normal() + if hot { 18.0 } else { 0.0 };
        let mut csv = String::from(
            "shop,town,bread,weekday,temp_c,rain_mm,promo,prev_day_sold,loaves_sold\n",
        );
        for s in &mut shop_states {
            // Each shop has its own weather, close to the region's.
            let t = (temp + 1.5 * rng.normal()).clamp(-15.0, 35.0);
            let rain = if rng.uniform() < 0.35 {
                (rng.normal().abs() * 6.0).min(60.0)
            } else {
                0.0
            };
            for (bi, (bread, base)) in BREADS.iter().enumerate() {
                // Some lines are sold out or not baked on some days.
                if rng.uniform() < 0.06 {
                    continue;
                }
                let promo = match rng.below(20) {
                    0 | 1 => "discount",
                    2 => "tasting",
                    _ => "none",
                };
                let promo_factor = match promo {
                    "discount" => 1.35,
                    "tasting" => 1.15,
                    _ => 1.0,
                };
                // Warm days sell fewer dense loaves and more light ones.
                let heat = if *base > 30.0 {
                    1.0 + 0.012 * s.warmth * (t - 10.0)
                } else {
                    1.0 - 0.01 * s.warmth * (t - 10.0)
                };
                let wet = 1.0 - 0.012 * rain;
                let shift = if night >= SHIFT_NIGHT && s.town() == SHIFT_TOWN {
                    1.45
                } else {
                    1.0
                };
                let mean = base
                    * s.scale
                    * WEEKDAY_FACTOR[weekday]
                    * heat
                    * wet
                    * promo_factor
                    * shift
                    * supply;
                let sold = (mean + (mean.sqrt() + 1.0) * rng.normal()).round().max(0.0);
                let prev = s.prev[bi];
                s.prev[bi] = Some(sold);
                let prev_text = prev.map_or(String::new(), |p| format!("{p}"));
                let shop_field = if s.name.contains(',') {
                    format!("\"{}\"", s.name)
                } else {
                    s.name.clone()
                };
                writeln!(
                    csv,
                    "{shop_field},{},{bread},{},{t:.1},{rain:.1},{promo},{prev_text},{sold}",
                    s.town(),
                    WEEKDAYS[weekday]
                )
                .expect("write to String");
            }
        }
        if night == BAD_NIGHT {
            csv = damage(&csv);
        }
        let name = format!("night-{night:02}.csv");
        out.push((name, csv.clone()));
        if night == RESENT_NIGHT {
            out.push((format!("night-{night:02}.resent.csv"), csv));
        }
    }
    out
}

/// Puts the mistakes a tired export script makes into a few rows.
fn damage(csv: &str) -> String {
    let mut lines: Vec<String> = csv.lines().map(str::to_string).collect();
    // A temperature written as text, a negative rainfall, and a row that
    // lost its last field.
    let replace_field = |line: &str, idx: usize, value: &str| {
        let mut f: Vec<String> = line.split(',').map(str::to_string).collect();
        f[idx] = value.to_string();
        f.join(",")
    };
    lines[40] = replace_field(&lines[40], 4, "n/a");
    lines[311] = replace_field(&lines[311], 5, "-2.5");
    let cut = lines[702].rfind(',').expect("row has fields");
    lines[702].truncate(cut);
    let mut out = lines.join("\n");
    out.push('\n');
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scenario_shape() {
        let f = files(SEED);
        assert_eq!(f.len(), NIGHTS + 1);
        for (name, text) in &f {
            let rows = text.lines().count() - 1;
            assert!((1000..=3000).contains(&rows), "{name}: {rows} rows");
        }
        assert!(!f[NEW_SHOP_NIGHT - 2].1.contains(NEW_SHOP));
        assert!(f[NEW_SHOP_NIGHT - 1].1.contains(NEW_SHOP));
        assert_eq!(f[RESENT_NIGHT - 1].1, f[RESENT_NIGHT].1);
        assert_eq!(files(SEED), f, "deterministic");
    }
}
