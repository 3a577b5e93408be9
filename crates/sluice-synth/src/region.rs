//! The invented region: towns, postcode centroids and GP practices.
//!
//! Postcodes use the area letters "QV", which no real postcode area uses (Q never begins one), and
//! the region sits at sea (around 54.9° N, 2.6° E) so that no coordinate names a real place.

use rand::Rng;
use rand_distr::{Distribution, Normal};

#[derive(Clone, Debug)]
pub struct Postcode {
    pub code: String,
    pub lat: f64,
    pub lon: f64,
    pub town: usize,
}

#[derive(Clone, Debug)]
pub struct Practice {
    pub code: String,
    pub name: String,
    pub postcode: usize,
    pub town: usize,
}

#[derive(Clone, Debug)]
pub struct Region {
    pub postcodes: Vec<Postcode>,
    pub practices: Vec<Practice>,
    pub towns: Vec<Town>,
}

#[derive(Clone, Debug)]
pub struct Town {
    pub name: &'static str,
    pub lat: f64,
    pub lon: f64,
    /// Share of the population living there.
    pub weight: f64,
    /// Spread of homes around the centre, in degrees of latitude.
    pub spread: f64,
}

const TOWNS: [(&str, f64, f64, f64, f64); 6] = [
    ("Quillmere", 54.90, 2.60, 0.34, 0.030),
    ("Harrowfen", 55.05, 2.35, 0.20, 0.025),
    ("Oxtable", 54.78, 2.92, 0.16, 0.022),
    ("Saltreach", 55.12, 2.88, 0.12, 0.020),
    ("Brackenholt", 54.70, 2.40, 0.10, 0.030),
    ("Lowmarsh", 54.98, 3.15, 0.08, 0.045),
];

const PRACTICE_WORDS: [&str; 12] = [
    "Mill Lane",
    "Riverside",
    "Market Cross",
    "Orchard",
    "Beacon",
    "Heathside",
    "Northgate",
    "Church View",
    "Willow Bank",
    "Harbour",
    "Meadowfield",
    "Stonebridge",
];

/// Inward-code letters as used in postcodes (C I K M O V are never used there).
const INWARD_LETTERS: &[u8] = b"ABDEFGHJLNPQRSTUWXYZ";

impl Region {
    pub fn generate(rng: &mut impl Rng, n_postcodes: usize, n_practices: usize) -> Self {
        let towns: Vec<Town> = TOWNS
            .iter()
            .map(|&(name, lat, lon, weight, spread)| Town {
                name,
                lat,
                lon,
                weight,
                spread,
            })
            .collect();
        let unit = Normal::new(0.0, 1.0).expect("unit normal");
        let mut postcodes = Vec::with_capacity(n_postcodes);
        let mut seen = std::collections::HashSet::new();
        let lon_scale = 1.0 / 54.9f64.to_radians().cos();
        while postcodes.len() < n_postcodes {
            let town = pick_weighted(rng, towns.iter().map(|t| t.weight));
            let t = &towns[town];
            // Districts are numbered by town so neighbouring postcodes share an outward code.
            let district = 1 + town * 4 + rng.random_range(0..4);
            let sector = rng.random_range(0..10);
            let a = INWARD_LETTERS[rng.random_range(0..INWARD_LETTERS.len())] as char;
            let b = INWARD_LETTERS[rng.random_range(0..INWARD_LETTERS.len())] as char;
            let code = format!("QV{district} {sector}{a}{b}");
            if !seen.insert(code.clone()) {
                continue;
            }
            let lat = t.lat + t.spread * unit.sample(rng);
            let lon = t.lon + t.spread * lon_scale * unit.sample(rng);
            postcodes.push(Postcode {
                code,
                lat: round6(lat),
                lon: round6(lon),
                town,
            });
        }
        let mut practices = Vec::with_capacity(n_practices);
        for i in 0..n_practices {
            // Every town gets practices in proportion to its size, at least one.
            let town = if i < towns.len() {
                i
            } else {
                pick_weighted(rng, towns.iter().map(|t| t.weight))
            };
            let candidates: Vec<usize> = (0..postcodes.len())
                .filter(|&p| postcodes[p].town == town)
                .collect();
            let postcode = candidates[rng.random_range(0..candidates.len())];
            let word = PRACTICE_WORDS[i % PRACTICE_WORDS.len()];
            practices.push(Practice {
                code: format!("QP{:03}", i + 1),
                name: format!("{word} Surgery, {}", towns[town].name),
                postcode,
                town,
            });
        }
        Self {
            postcodes,
            practices,
            towns,
        }
    }

    pub fn practices_csv(&self) -> String {
        let mut s = String::from("practice_code,practice_name,postcode,latitude,longitude\n");
        for p in &self.practices {
            let pc = &self.postcodes[p.postcode];
            s.push_str(&format!(
                "{},\"{}\",{},{},{}\n",
                p.code, p.name, pc.code, pc.lat, pc.lon
            ));
        }
        s
    }

    pub fn postcodes_csv(&self) -> String {
        let mut s = String::from("postcode,latitude,longitude\n");
        for pc in &self.postcodes {
            s.push_str(&format!("{},{},{}\n", pc.code, pc.lat, pc.lon));
        }
        s
    }
}

fn round6(x: f64) -> f64 {
    (x * 1e6).round() / 1e6
}

pub fn pick_weighted(rng: &mut impl Rng, weights: impl Iterator<Item = f64> + Clone) -> usize {
    let total: f64 = weights.clone().sum();
    let mut x = rng.random::<f64>() * total;
    let mut last = 0;
    for (i, w) in weights.enumerate() {
        if x < w {
            return i;
        }
        x -= w;
        last = i;
    }
    last
}
