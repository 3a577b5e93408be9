//! Free text written into the clinical-details field, the way requesters actually type it:
//! full drug names, abbreviations and misspellings, stray quotes, commas and line breaks.

use rand::Rng;

pub const METHOTREXATE: &[(&str, f64)] = &[
    ("methotrexate", 0.40),
    ("Methotrexate", 0.15),
    ("MTX", 0.15),
    ("mtx", 0.08),
    ("methotrexat", 0.06),
    ("metotrexate", 0.06),
    ("methotrexte", 0.05),
    ("methatrexate", 0.05),
];

/// Other DMARDs, grouped by drug; each drug's spellings with weights.
pub const OTHER_DMARDS: &[(&str, &[(&str, f64)])] = &[
    (
        "leflunomide",
        &[
            ("leflunomide", 0.7),
            ("Leflunomide", 0.2),
            ("leflunamide", 0.1),
        ],
    ),
    (
        "sulfasalazine",
        &[
            ("sulfasalazine", 0.4),
            ("sulphasalazine", 0.4),
            ("SSZ", 0.1),
            ("sulfasalazin", 0.1),
        ],
    ),
    (
        "hydroxychloroquine",
        &[
            ("hydroxychloroquine", 0.6),
            ("HCQ", 0.2),
            ("hydroxychloroquin", 0.2),
        ],
    ),
    (
        "azathioprine",
        &[
            ("azathioprine", 0.7),
            ("Azathioprine", 0.2),
            ("azathioprin", 0.1),
        ],
    ),
    (
        "mycophenolate",
        &[
            ("mycophenolate", 0.5),
            ("mycophenolate mofetil", 0.3),
            ("MMF", 0.2),
        ],
    ),
];

pub fn pick<'a>(rng: &mut impl Rng, options: &'a [(&'a str, f64)]) -> &'a str {
    let i = crate::region::pick_weighted(rng, options.iter().map(|o| o.1));
    options[i].0
}

/// Notes of a routine monitoring request. `other` is a co-prescribed DMARD's spelling, if any.
pub fn monitoring(rng: &mut impl Rng, drug: &str, other: Option<&str>, dose: u32) -> String {
    let drugs = match other {
        Some(o) if rng.random_bool(0.5) => format!("{drug} + {o}"),
        Some(o) => format!("{o} and {drug}"),
        None => drug.to_string(),
    };
    match rng.random_range(0..9) {
        0 => format!("{drugs} monitoring"),
        1 => format!("DMARD monitoring - {drugs} {dose}mg weekly"),
        2 => format!("Routine monitoring, on {drugs}"),
        3 => format!("{drugs} bloods - routine monitoring\nplease copy to rheumatology"),
        4 => format!("Drug monitoring: {drugs}, \"stable dose\""),
        5 => format!("monitoring; {drugs}; {dose} mg/week"),
        6 => format!("shared care monitoring ({drugs})"),
        7 => format!("DMARD bloods, {drugs} – monitoring"),
        _ => format!("{drugs} {dose}mg wkly. monitoring bloods\r\nnext due 3/12"),
    }
}

/// Notes of an unrelated request; `on_mtx` lets a patient on methotrexate mention it in passing
/// (a drug tag with no monitoring marker).
pub fn background(rng: &mut impl Rng, acute: bool, on_mtx: Option<&str>) -> String {
    if let Some(drug) = on_mtx
        && rng.random_bool(0.3)
    {
        return match rng.random_range(0..3) {
            0 => format!("?sepsis, on {drug}"),
            1 => format!("fever, on {drug} ?neutropenic"),
            _ => format!("pre-op; takes {drug}"),
        };
    }
    const ACUTE: &[&str] = &[
        "",
        "chest pain",
        "?sepsis",
        "collapse",
        "fall, on warfarin",
        "AKI?",
        "SOB",
        "abdo pain, vomiting",
        "confusion",
        "post-op day 1",
        "\"unwell\", ?cause",
    ];
    const ROUTINE: &[&str] = &[
        "",
        "",
        "TATT",
        "?hypothyroid",
        "diabetic review",
        "annual review - on ramipril",
        "BP monitoring, on amlodipine",
        "lithium monitoring",
        "pre-op bloods",
        "routine",
        "weight loss, ?cause",
        "CKD review",
        "on statin, LFTs please",
    ];
    let list = if acute { ACUTE } else { ROUTINE };
    list[rng.random_range(0..list.len())].to_string()
}
