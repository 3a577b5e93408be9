//! What each command does: resolve paths, call the library, print the outcome.

use crate::cli::{
    ApproveArgs, Cli, Command, DecisionArg, DemoArgs, KeyCommand, LinkArgs, MeasureArgs,
    ReleaseArgs, SynthArgs,
};
use anyhow::{Context, Result, bail};
use chrono::NaiveDate;
use sluice_policy::{AnalyteTable, Profile};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

pub fn run(cli: Cli) -> Result<ExitCode> {
    match cli.command {
        Command::Synth(a) => synth(&cli.policies, a),
        Command::Demo(a) => demo(&cli.policies, a),
        Command::Key(k) => key(k),
        Command::Link(a) => link(&cli.policies, &a).map(|_| ExitCode::SUCCESS),
        Command::Measure(a) => measure(&cli.policies, &a).map(|_| ExitCode::SUCCESS),
        Command::Release(a) => release(&cli.policies, &a).map(|_| ExitCode::SUCCESS),
        Command::Check { release } => check(&cli.policies, &release),
        Command::Approve(a) => approve(&cli.policies, &a).map(|_| ExitCode::SUCCESS),
        Command::Export { release, to } => {
            export(&cli.policies, &release, &to).map(|_| ExitCode::SUCCESS)
        }
    }
}

fn key(k: KeyCommand) -> Result<ExitCode> {
    match k {
        KeyCommand::New { out, label } => {
            let key = sluice_link::key::Key::generate(&label)?;
            key.save(&out)?;
            eprintln!(
                "wrote key {} (mode 0600); keep it inside the secure environment",
                out.display()
            );
            println!("key fingerprint {}", key.fingerprint());
        }
        KeyCommand::Fingerprint { file } => {
            println!("{}", sluice_link::key::Key::load(&file)?.fingerprint());
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// A policy file given by path, or by name under `<policies>/<dir>/`.
fn named_policy(policies: &Path, dir: &str, name: &str) -> PathBuf {
    let p = PathBuf::from(name);
    if p.extension().is_some() || p.components().count() > 1 {
        p
    } else {
        policies.join(dir).join(format!("{name}.toml"))
    }
}

fn release(policies: &Path, a: &ReleaseArgs) -> Result<sluice_release::ReleaseManifest> {
    let candidates = sluice_aggregate::Candidates::load(&a.work)?;
    let rules_path = named_policy(policies, "disclosure", &a.rules);
    let rules = sluice_disclose::Rules::load(&rules_path)?;
    let floor = sluice_disclose::Floor::load(&policies.join("disclosure/floor.toml"))?;
    rules.check_floor(&floor)?;
    let mut checked = Vec::with_capacity(candidates.tables.len());
    for t in &candidates.tables {
        checked.push(sluice_disclose::control(t, &rules)?);
    }
    let report = crate::report::render(&candidates.provenance, &rules, &checked)?;
    let m = sluice_release::write_release(
        &a.out,
        &candidates.provenance,
        &rules,
        &checked,
        &[("report.html".to_string(), report.into_bytes())],
    )?;
    let withheld: usize = checked.iter().map(|t| t.withheld()).sum();
    let rows: usize = checked.iter().map(|t| t.rows().len()).sum();
    eprintln!(
        "release {}: {} tables, {rows} rows, {withheld} withheld under {}",
        a.out.display(),
        checked.len(),
        rules_path.display()
    );
    eprintln!("next: sluice check {}", a.out.display());
    Ok(m)
}

fn check_policy(policies: &Path) -> Result<sluice_release::CheckPolicy> {
    Ok(sluice_release::CheckPolicy::load_dir(
        &policies.join("disclosure"),
    )?)
}

fn check(policies: &Path, rel: &Path) -> Result<ExitCode> {
    let verdict = sluice_release::check(rel, &check_policy(policies)?);
    println!("{verdict}");
    Ok(if verdict.passed() {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(1)
    })
}

fn approve(policies: &Path, a: &ApproveArgs) -> Result<sluice_release::ApprovalRecord> {
    let decision = match a.decision {
        DecisionArg::Approved => sluice_release::Decision::Approved,
        DecisionArg::Rejected => sluice_release::Decision::Rejected,
    };
    let r = sluice_release::approve(
        &a.release,
        &a.reviewer,
        decision,
        &a.note,
        &check_policy(policies)?,
    )?;
    println!(
        "{:?} by {} at {} for manifest {}",
        r.decision, r.reviewer, r.time_utc, r.manifest_sha256
    );
    Ok(r)
}

fn export(policies: &Path, rel: &Path, to: &Path) -> Result<sluice_release::ExportReport> {
    let r = sluice_release::export(rel, to, &check_policy(policies)?)?;
    println!(
        "exported {} files ({} bytes) to {}, approved by {} at {}",
        r.files.len(),
        r.bytes,
        r.to.display(),
        r.reviewer,
        r.approved_at
    );
    Ok(r)
}

fn measure(policies: &Path, a: &MeasureArgs) -> Result<sluice_study::Outcome> {
    let study = named_policy(policies, "studies", &a.study);
    let o = sluice_study::measure(&sluice_study::Options {
        study: &study,
        policies,
        store: &a.store,
        work: &a.work,
    })?;
    if std::env::var_os("SLUICE_PROFILE").is_some() {
        for (name, secs) in &o.timings {
            eprintln!("measure {name}: {secs:.3} s");
        }
    }
    eprintln!(
        "measure {}: {} result rows read{}",
        o.study,
        o.rows_read,
        o.cohort_size
            .map(|n| format!(", cohort of {n} patients"))
            .unwrap_or_default()
    );
    for (name, rows) in &o.tables {
        println!("{name}\t{rows}");
    }
    eprintln!(
        "aggregate candidates: {} (inside the secure area; release them with sluice release)",
        o.candidates.display()
    );
    Ok(o)
}

fn link(policies: &Path, a: &LinkArgs) -> Result<sluice_link::Report> {
    let (profile, analytes) = load_policies(policies, &a.profile)?;
    let tags = sluice_link::tags::TagDictionary::load(&named_policy(policies, "tags", &a.tags))?;
    let key = sluice_link::key::Key::load(&a.key)?;
    let geo = match (&a.postcodes, &a.practices) {
        (Some(pc), Some(pr)) => Some(sluice_link::geo::Geo::load(pc, pr)?),
        _ => None,
    };
    let quarantine = a.quarantine.clone().unwrap_or_else(|| {
        let mut q = a.store.clone().into_os_string();
        q.push("-quarantine");
        PathBuf::from(q)
    });
    let inputs = sluice_link::Inputs {
        profile: &profile,
        analytes: &analytes,
        tags: &tags,
        key: &key,
        geo: geo.as_ref(),
    };
    let opts = sluice_link::Options {
        store: a.store.clone(),
        quarantine: quarantine.clone(),
        keep_area: a.keep_area,
    };
    let bar = progress(a.files.len() as u64, "link");
    let started = std::time::Instant::now();
    println!("file\trows\tstored\tquarantined\tduplicate\tsuperseded\tcancelled");
    let report = sluice_link::link(&inputs, &opts, &a.files, |f| {
        bar.inc(1);
        let name = f
            .file
            .file_name()
            .map(|n| n.to_string_lossy().to_string())
            .unwrap_or_default();
        let c = &f.accounting;
        bar.suspend(|| {
            if f.skipped {
                println!("{name}\talready linked (same SHA-256), skipped");
            } else {
                println!(
                    "{name}\t{}\t{}\t{}\t{}\t{}\t{}",
                    c.rows, c.stored, c.quarantined, c.duplicate, c.superseded, c.cancelled
                );
            }
        });
    })?;
    bar.finish_and_clear();
    let t = &report.totals;
    println!(
        "store\t{}\t{} current\t{}\t{}\t{}\t{}",
        t.rows, report.current_rows, t.quarantined, t.duplicate, t.superseded, t.cancelled
    );
    eprintln!(
        "linked in {:.1}s: rows read {} = current {} + superseded {} + quarantined {} + duplicate {} + cancelled {}",
        started.elapsed().as_secs_f64(),
        t.rows,
        report.current_rows,
        t.superseded,
        t.quarantined,
        t.duplicate,
        t.cancelled
    );
    eprintln!(
        "store: {}   quarantine: {}",
        a.store.display(),
        quarantine.display()
    );
    Ok(report)
}

/// A profile given by path, or by name under `<policies>/profiles/`.
fn profile_path(policies: &Path, name: &str) -> PathBuf {
    let p = PathBuf::from(name);
    if p.extension().is_some() || p.components().count() > 1 {
        p
    } else {
        policies.join("profiles").join(format!("{name}.toml"))
    }
}

fn load_policies(policies: &Path, profile: &str) -> Result<(Profile, AnalyteTable)> {
    let analytes = AnalyteTable::load(&policies.join("analytes.toml"))?;
    let profile = Profile::load(&profile_path(policies, profile))?;
    profile.check_against(&analytes)?;
    Ok((profile, analytes))
}

fn parse_month(s: &str) -> Result<NaiveDate> {
    NaiveDate::parse_from_str(&format!("{s}-01"), "%Y-%m-%d")
        .with_context(|| format!("--start {s:?}: expected YYYY-MM"))
}

fn progress(total: u64, what: &str) -> indicatif::ProgressBar {
    let bar = indicatif::ProgressBar::with_draw_target(
        Some(total),
        indicatif::ProgressDrawTarget::stderr(),
    );
    bar.set_style(
        indicatif::ProgressStyle::with_template("{msg:12} [{bar:40}] {pos}/{len} {elapsed}")
            .expect("template")
            .progress_chars("=> "),
    );
    bar.set_message(what.to_string());
    bar
}

fn synth_config(a: &SynthArgs) -> Result<sluice_synth::Config> {
    let mut cfg = sluice_synth::Config::new(a.seed, a.patients, a.months, parse_month(&a.start)?);
    if let Some(pc) = &a.policy_change {
        cfg.policy_change = NaiveDate::parse_from_str(pc, "%Y-%m-%d")
            .with_context(|| format!("--policy-change {pc:?}: expected YYYY-MM-DD"))?;
    }
    cfg.rows = a.rows;
    cfg.mtx_share = a.mtx_share;
    cfg.overlap_days = a.overlap_days;
    Ok(cfg)
}

fn synth(policies: &Path, a: SynthArgs) -> Result<ExitCode> {
    let (profile, analytes) = load_policies(policies, &a.profile)?;
    let cfg = synth_config(&a)?;
    let bar = progress(u64::from(cfg.months), "synth");
    let started = std::time::Instant::now();
    let summary = sluice_synth::run(cfg, profile, &analytes, &a.out, |_| bar.inc(1))?;
    bar.finish_and_clear();
    let q: u64 = summary.totals.quarantined.values().sum();
    println!(
        "wrote {} rows in {} files to {} in {:.1}s",
        summary.totals.rows,
        summary.files.len(),
        a.out.join("extracts").display(),
        started.elapsed().as_secs_f64()
    );
    println!(
        "planted: {} patients ({} on methotrexate), {} critical values, {} to quarantine, {} duplicates, {} cancelled, {} superseded",
        summary.patients_by_group.values().sum::<u64>(),
        summary
            .patients_by_group
            .iter()
            .filter(|(k, _)| k.starts_with("mtx"))
            .map(|(_, v)| v)
            .sum::<u64>(),
        summary.critical_rows,
        q,
        summary.totals.duplicate,
        summary.totals.cancelled,
        summary.totals.superseded
    );
    println!("ground truth: {}", a.out.join("truth").display());
    Ok(ExitCode::SUCCESS)
}

/// Runs every stage that exists on the demo data into a fresh folder.
fn demo(policies: &Path, a: DemoArgs) -> Result<ExitCode> {
    if a.out.exists() && std::fs::read_dir(&a.out)?.next().is_some() {
        bail!(
            "demo output folder {} is not empty; remove it or pass --out",
            a.out.display()
        );
    }
    std::fs::create_dir_all(&a.out)
        .with_context(|| format!("cannot create {}", a.out.display()))?;
    let truth_path = a.data.join("truth/summary.json");
    let truth: serde_json::Value = serde_json::from_slice(
        &std::fs::read(&truth_path)
            .with_context(|| format!("cannot read {}", truth_path.display()))?,
    )
    .with_context(|| format!("{} is not valid JSON", truth_path.display()))?;
    let site = truth["site"]
        .as_str()
        .context("summary.json has no site")?
        .to_string();

    // Stage 1: the demo data is regenerated from its recorded settings and compared byte for byte,
    // which shows the generator is deterministic and the committed data is what it claims to be.
    println!(
        "[1/3] synth: regenerating the demo data from {}",
        truth_path.display()
    );
    let c = &truth["config"];
    let get = |k: &str| {
        c[k].as_u64()
            .with_context(|| format!("summary.json config.{k} missing"))
    };
    let args = SynthArgs {
        profile: site.clone(),
        out: a.out.join("synth"),
        seed: get("seed")?,
        patients: get("patients")? as u32,
        months: get("months")? as u32,
        start: c["start"].as_str().context("config.start")?[..7].to_string(),
        policy_change: c["policy_change"].as_str().map(str::to_string),
        rows: c["rows"].as_u64(),
        mtx_share: c["mtx_share"].as_f64().context("config.mtx_share")?,
        overlap_days: get("overlap_days")? as u32,
    };
    let (profile, analytes) = load_policies(policies, &site)?;
    let out = args.out.clone();
    sluice_synth::run(synth_config(&args)?, profile, &analytes, &out, |_| {})?;
    let mut differing = Vec::new();
    for sub in ["extracts", "reference", "truth"] {
        for entry in std::fs::read_dir(a.data.join(sub))? {
            let entry = entry?;
            let theirs = std::fs::read(entry.path())?;
            let ours = std::fs::read(out.join(sub).join(entry.file_name())).unwrap_or_default();
            if theirs != ours {
                differing.push(format!("{sub}/{}", entry.file_name().to_string_lossy()));
            }
        }
    }
    if !differing.is_empty() {
        bail!(
            "the regenerated demo differs from {} in: {}",
            a.data.display(),
            differing.join(", ")
        );
    }
    println!(
        "      identical to {} ({})",
        a.data.display(),
        out.display()
    );

    // Stage 2: a fresh key, made the way a site makes one. It never leaves the output folder.
    let key_path = a.out.join("secure/key");
    std::fs::create_dir_all(a.out.join("secure"))?;
    println!("[2/3] key: making a new pseudonymisation key");
    key(KeyCommand::New {
        out: key_path.clone(),
        label: format!("{site}-demo"),
    })?;

    // Stage 3: link every monthly extract into the store.
    println!("[3/3] link: linking {}", a.data.join("extracts").display());
    let mut files: Vec<PathBuf> = std::fs::read_dir(a.data.join("extracts"))?
        .map(|e| e.map(|e| e.path()))
        .collect::<Result<_, _>>()?;
    files.sort();
    let store = a.out.join("secure/store");
    let report = link(
        policies,
        &LinkArgs {
            profile: site.clone(),
            key: key_path,
            store: store.clone(),
            quarantine: Some(a.out.join("secure/quarantine")),
            tags: "dmard".into(),
            postcodes: Some(a.data.join("reference/postcodes.csv")),
            practices: Some(a.data.join("reference/practices.csv")),
            keep_area: false,
            files,
        },
    )?;
    let expected = truth["expected_stored"].as_u64().unwrap_or(0);
    if report.current_rows != expected {
        bail!(
            "the linked store holds {} current results but the planted truth expects {expected}",
            report.current_rows
        );
    }
    println!(
        "      {} current results stored, as the planted truth expects",
        report.current_rows
    );
    println!();
    println!("done: output in {}", a.out.display());
    println!(
        "  secure/store        pseudonymised results (Parquet) and manifest.json with the accounting"
    );
    println!(
        "  secure/quarantine   rows set aside, with file, line, field, reason and the raw line"
    );
    println!(
        "  secure/key          the demo's key (mode 0600); a real key never leaves the secure machine"
    );
    println!("  synth               the regenerated demo data");
    Ok(ExitCode::SUCCESS)
}
