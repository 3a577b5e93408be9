//! What each command does: resolve paths, call the library, print the outcome.

use crate::cli::{
    ApproveArgs, Cli, Command, DecisionArg, DemoArgs, KeyCommand, LinkArgs, MeasureArgs,
    ReleaseArgs, ReviewerCommand, SynthArgs,
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
        Command::Ledger { store } => ledger(&store).map(|_| ExitCode::SUCCESS),
        Command::Approve(a) => approve(&cli.policies, &a).map(|_| ExitCode::SUCCESS),
        Command::Reviewer(r) => reviewer(r).map(|_| ExitCode::SUCCESS),
        Command::Pool(a) => {
            pool(&cli.policies, &a.releases, &a.rules, &a.out).map(|_| ExitCode::SUCCESS)
        }
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
    let candidates_path = a.work.join(sluice_aggregate::Candidates::FILE);
    let candidates_sha256 = sluice_aggregate::sha256_hex(
        &std::fs::read(&candidates_path)
            .with_context(|| format!("reading {}", candidates_path.display()))?,
    );
    let rules_path = named_policy(policies, "disclosure", &a.rules);
    let rules = sluice_disclose::Rules::load(&rules_path)?;
    let floor = sluice_disclose::Floor::load(&policies.join("disclosure/floor.toml"))?;
    rules.check_floor(&floor)?;
    let mut checked = sluice_disclose::control_all(&candidates.tables, &rules)?;

    // The differencing guard against every earlier release from the same store.
    let ledger_path = match (&a.ledger, candidates.store.is_empty()) {
        (Some(p), _) => Some(p.clone()),
        (None, false) => Some(sluice_ledger::ledger_path(Path::new(&candidates.store))),
        (None, true) => None,
    };
    let populations = sluice_ledger::populations(&candidates);
    let mut ledger = match &ledger_path {
        Some(p) => Some(sluice_ledger::Ledger::load(p)?),
        None => None,
    };
    let release_name = a.out.to_string_lossy().into_owned();
    if let Some(l) = &ledger {
        let pairs = sluice_ledger::pairs(
            l,
            &populations,
            &candidates.provenance.site,
            &release_name,
            rules.threshold(),
        );
        let g = sluice_ledger::guard(&mut checked, &populations, pairs, &rules)?;
        for p in &g.pairs {
            eprintln!(
                "differencing: population {} ({} patients) differs from {} of {} (study {}) by {} patients: its rows are withheld",
                p.population,
                p.size,
                p.earlier_population,
                p.earlier_release,
                p.earlier_study,
                p.differ_by
            );
        }
    }

    let mut provenance = candidates.provenance.clone();
    provenance.made_by = a.analyst.clone().unwrap_or_default();
    provenance.inputs.push(sluice_aggregate::Input {
        role: "candidates".into(),
        // The file's name only: the work folder's path inside the secure area is not released.
        path: sluice_aggregate::Candidates::FILE.into(),
        sha256: candidates_sha256,
    });
    let report = crate::report::render(&provenance, &rules, &checked)?;
    let m = sluice_release::write_release(
        &a.out,
        &provenance,
        &rules,
        &checked,
        &[("report.html".to_string(), report.into_bytes())],
    )?;
    let log = disclosure_log(&a.work, &a.out, &checked)?;
    if let (Some(l), Some(p)) = (&mut ledger, &ledger_path) {
        let sha = sluice_aggregate::sha256_hex(&m.to_bytes());
        l.record(
            p,
            sluice_ledger::entry(&a.out, &sha, &candidates, &checked, populations),
        )?;
        eprintln!("recorded in the ledger {}", p.display());
    }
    let withheld: usize = checked.iter().map(|t| t.withheld()).sum();
    let rows: usize = checked.iter().map(|t| t.rows().len()).sum();
    eprintln!(
        "release {}: {} tables, {rows} rows, {withheld} withheld under {}; reasons in {}",
        a.out.display(),
        checked.len(),
        rules_path.display(),
        log.display()
    );
    eprintln!("next: sluice check {}", a.out.display());
    Ok(m)
}

/// Writes why each row and value was withheld to `<work>/disclosure-log.json`: inside the secure
/// area, for the IG officer, never released (a released file says only `withheld`).
fn disclosure_log(
    work: &Path,
    out: &Path,
    checked: &[sluice_disclose::CheckedTable],
) -> Result<PathBuf> {
    let mut rows = Vec::new();
    for t in checked {
        for (r, s) in t.status().iter().enumerate() {
            if s.is_withheld() {
                rows.push(
                    serde_json::json!({"table": t.name(), "row": r, "status": s.log_label()}),
                );
            }
        }
        for n in t.notes() {
            rows.push(serde_json::json!({"table": t.name(), "row": n.row, "column": n.column, "status": format!("withheld:{}", n.reason)}));
        }
    }
    let path = work.join("disclosure-log.json");
    let doc = serde_json::json!({"release": out.to_string_lossy(), "withheld": rows});
    std::fs::write(&path, serde_json::to_vec_pretty(&doc)?)
        .with_context(|| format!("writing {}", path.display()))?;
    Ok(path)
}

fn ledger(store: &Path) -> Result<()> {
    let path = sluice_ledger::ledger_path(store);
    let l = sluice_ledger::Ledger::load(&path)?;
    if l.entries.is_empty() {
        eprintln!("{}: no release recorded", path.display());
    }
    println!("made_utc\tsite\tstudy\treleased_rows\tpopulations\tmanifest_sha256\trelease");
    for e in &l.entries {
        let pops: Vec<String> = e
            .populations
            .iter()
            .map(|p| format!("{}={}", p.name, p.size))
            .collect();
        println!(
            "{}\t{}\t{}\t{}\t{}\t{}\t{}",
            e.made_utc,
            e.site,
            e.study,
            e.released_rows,
            pops.join(","),
            e.manifest_sha256,
            e.release
        );
    }
    Ok(())
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
    let key = sluice_release::ReviewerKey::load(&a.key)?;
    let r = sluice_release::approve(
        &a.release,
        &key,
        decision,
        &a.note,
        &check_policy(policies)?,
    )?;
    println!(
        "{:?} by {} at {} for manifest {}, signed; logged in {}",
        r.decision,
        r.reviewer,
        r.time_utc,
        r.manifest_sha256,
        sluice_release::decisions_log(&a.release).display()
    );
    Ok(r)
}

fn reviewer(r: ReviewerCommand) -> Result<()> {
    match r {
        ReviewerCommand::New { name, out } => {
            let key = sluice_release::ReviewerKey::generate(&name)?;
            key.save(&out)?;
            eprintln!(
                "wrote reviewer key {} (mode 0600); it stays with the reviewer. Register its public half in <policies>/disclosure/reviewers.toml:",
                out.display()
            );
            println!(
                "[[reviewer]]\nname = {:?}\npublic_key = \"{}\"",
                key.name(),
                key.public_hex()
            );
        }
    }
    Ok(())
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

/// Makes a key and links every extract of one demo site into `<secure>/store`.
fn demo_site(
    policies: &Path,
    site: &str,
    data: &Path,
    secure: &Path,
    quiet: bool,
) -> Result<PathBuf> {
    std::fs::create_dir_all(secure)?;
    let key_path = secure.join("key");
    let key = sluice_link::key::Key::generate(&format!("{site}-demo"))?;
    key.save(&key_path)?;
    if !quiet {
        println!(
            "      key {} (fingerprint {})",
            key_path.display(),
            key.fingerprint()
        );
    }
    let mut files: Vec<PathBuf> = std::fs::read_dir(data.join("extracts"))?
        .map(|e| e.map(|e| e.path()))
        .collect::<Result<_, _>>()?;
    files.sort();
    let store = secure.join("store");
    link(
        policies,
        &LinkArgs {
            profile: site.into(),
            key: key_path,
            store: store.clone(),
            quarantine: Some(secure.join("quarantine")),
            tags: "dmard".into(),
            postcodes: Some(data.join("reference/postcodes.csv")),
            practices: Some(data.join("reference/practices.csv")),
            keep_area: false,
            files,
        },
    )?;
    Ok(store)
}

fn measure_quiet(
    policies: &Path,
    study: &str,
    store: &Path,
    work: &Path,
) -> Result<sluice_study::Outcome> {
    let study = named_policy(policies, "studies", study);
    Ok(sluice_study::measure(&sluice_study::Options {
        study: &study,
        policies,
        store,
        work,
    })?)
}

/// The demo's reviewers: a signing key each, made in the demo's secure folder, and a register
/// of their public halves that the demo's policy uses in place of the site's.
struct DemoReviewers {
    keys: Vec<sluice_release::ReviewerKey>,
    policy: sluice_release::CheckPolicy,
}

impl DemoReviewers {
    fn make(policies: &Path, dir: &Path, names: &[&str]) -> Result<DemoReviewers> {
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
        let mut toml = String::from(
            "# Reviewers of the demo's invented sites, made by `sluice demo`.\ntwo_person = true\n",
        );
        let mut keys = Vec::new();
        for (i, name) in names.iter().enumerate() {
            let key = sluice_release::ReviewerKey::generate(name)?;
            key.save(&dir.join(format!("reviewer-{i}.key")))?;
            toml.push_str(&format!(
                "\n[[reviewer]]\nname = {name:?}\npublic_key = \"{}\"\n",
                key.public_hex()
            ));
            keys.push(key);
        }
        let path = dir.join("reviewers.toml");
        std::fs::write(&path, toml).with_context(|| format!("writing {}", path.display()))?;
        let policy = check_policy(policies)?.with_reviewers(sluice_release::Registry::load(&path)?);
        Ok(DemoReviewers { keys, policy })
    }

    fn approve(&self, rel: &Path, name: &str) -> Result<()> {
        let key = self
            .keys
            .iter()
            .find(|k| k.name() == name)
            .with_context(|| format!("no demo reviewer {name}"))?;
        sluice_release::approve(
            rel,
            key,
            sluice_release::Decision::Approved,
            "demo release: synthetic data of an invented region",
            &self.policy,
        )?;
        Ok(())
    }
}

fn pool(
    policies: &Path,
    inputs: &[PathBuf],
    rules: &str,
    out: &Path,
) -> Result<sluice_pool::PoolReport> {
    let rules_path = named_policy(policies, "disclosure", rules);
    let rules = sluice_disclose::Rules::load(&rules_path)?;
    rules.check_floor(&sluice_disclose::Floor::load(
        &policies.join("disclosure/floor.toml"),
    )?)?;
    let r = sluice_pool::pool(inputs, out, &rules, &check_policy(policies)?)?;
    if !r.verdict.passed() {
        bail!(
            "the pooled release {} fails its check:\n{}",
            out.display(),
            r.verdict
        );
    }
    for (name, rows, withheld) in &r.tables {
        println!("{name}\t{rows}\t{withheld} withheld");
    }
    eprintln!(
        "pooled {} sites ({}) into {}: {} pooled estimates; check passed",
        r.sites.len(),
        r.sites.join(", "),
        out.display(),
        r.pooled_estimates
    );
    Ok(r)
}

fn pool_quiet(
    policies: &Path,
    policy: &sluice_release::CheckPolicy,
    inputs: &[PathBuf],
    out: &Path,
) -> Result<()> {
    let rules = sluice_disclose::Rules::load(&policies.join("disclosure/standard.toml"))?;
    let r = sluice_pool::pool(inputs, out, &rules, policy)?;
    if !r.verdict.passed() {
        bail!(
            "the pooled release {} fails its check:\n{}",
            out.display(),
            r.verdict
        );
    }
    Ok(())
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
        "[1/7] synth: regenerating the demo data from {}",
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

    // Stages 2-3: a fresh key, made the way a site makes one (it never leaves the secure folder),
    // and every monthly extract linked into the store.
    let secure = a.out.join("secure");
    println!("[2/7] key and link: a new pseudonymisation key, then every monthly extract");
    let store = demo_site(policies, &site, &a.data, &secure, false)?;
    let m =
        sluice_link::store::Manifest::load(&store)?.context("the demo store has no manifest")?;
    let expected = truth["expected_stored"].as_u64().unwrap_or(0);
    if m.current_rows != expected {
        bail!(
            "the linked store holds {} current results but the planted truth expects {expected}",
            m.current_rows
        );
    }
    println!(
        "      {} current results stored, as the planted truth expects",
        m.current_rows
    );

    // The reviewers sign with keys of their own, made here and registered for the demo only.
    let reviewers = DemoReviewers::make(
        policies,
        &secure.join("reviewers"),
        &[
            &format!("demo IG officer ({site})"),
            "demo IG officer (brackenholt)",
            "demo IG officer (saltreach)",
            "demo consortium lead",
        ],
    )?;

    // Stages 4-6: both shipped studies, each measured, released, checked, approved and exported.
    let studies = ["mtx-monitoring", "potassium-seasonal"];
    println!("[3/7] measure: {}", studies.join(", "));
    for st in studies {
        let o = measure_quiet(policies, st, &store, &secure.join("work").join(st))?;
        println!(
            "      {st}: {} tables{}",
            o.tables.len(),
            o.cohort_size
                .map(|n| format!(", cohort of {n} patients"))
                .unwrap_or_default()
        );
    }
    println!("[4/7] release and check: disclosure control, then the independent check");
    let releases = a.out.join("releases");
    for st in studies {
        let rel = releases.join(format!("{site}-{st}"));
        let m = release(
            policies,
            &ReleaseArgs {
                work: secure.join("work").join(st),
                rules: "standard".into(),
                out: rel.clone(),
                ledger: None,
                analyst: Some("demo analyst".into()),
            },
        )?;
        let verdict = sluice_release::check(&rel, &check_policy(policies)?);
        if !verdict.passed() {
            bail!(
                "the demo release {} fails its check:\n{verdict}",
                rel.display()
            );
        }
        println!(
            "      {}: {} files, check passed",
            rel.display(),
            m.files.len()
        );
    }
    println!(
        "[5/7] approve and export: a demo reviewer signs off; export copies only what was approved"
    );
    for st in studies {
        let rel = releases.join(format!("{site}-{st}"));
        reviewers.approve(&rel, &format!("demo IG officer ({site})"))?;
        let r = sluice_release::export(
            &rel,
            &a.out.join("export").join(format!("{site}-{st}")),
            &reviewers.policy,
        )?;
        println!(
            "      exported {} files to {}",
            r.files.len(),
            r.to.display()
        );
    }

    // Stage 7: the monitoring study at two more invented sites, each with its own key and extract
    // layout, then pooled from the approved releases alone.
    println!(
        "[6/7] two more sites: brackenholt (semicolon, Latin-1, day-first dates) and saltreach (tab, no header)"
    );
    let mut site_releases = vec![releases.join(format!("{site}-mtx-monitoring"))];
    for (other, seed) in [("brackenholt", 20_260_202_u64), ("saltreach", 20_260_303)] {
        let dir = a.out.join("sites").join(other);
        let args = SynthArgs {
            profile: other.into(),
            out: dir.join("data"),
            seed,
            ..args.clone()
        };
        let (profile, analytes) = load_policies(policies, other)?;
        sluice_synth::run(synth_config(&args)?, profile, &analytes, &args.out, |_| {})?;
        let store = demo_site(policies, other, &args.out, &dir.join("secure"), true)?;
        let work = dir.join("secure/work/mtx-monitoring");
        measure_quiet(policies, "mtx-monitoring", &store, &work)?;
        let rel = dir.join("release");
        release(
            policies,
            &ReleaseArgs {
                work,
                rules: "standard".into(),
                out: rel.clone(),
                ledger: None,
                analyst: Some("demo analyst".into()),
            },
        )?;
        reviewers.approve(&rel, &format!("demo IG officer ({other})"))?;
        println!(
            "      {other}: linked, measured, released and approved ({})",
            rel.display()
        );
        site_releases.push(rel);
    }
    println!("[7/7] pool: three approved site releases into one pooled release");
    let pooled = releases.join("pooled-mtx-monitoring");
    pool_quiet(policies, &reviewers.policy, &site_releases, &pooled)?;
    reviewers.approve(&pooled, "demo consortium lead")?;
    let r = sluice_release::export(
        &pooled,
        &a.out.join("export/pooled-mtx-monitoring"),
        &reviewers.policy,
    )?;
    println!(
        "      {}: checked, approved and exported to {}",
        pooled.display(),
        r.to.display()
    );

    println!();
    println!("done: output in {}", a.out.display());
    println!(
        "  secure/             inside the secure area only: key, store, quarantine, patient-level work"
    );
    println!(
        "  releases/           disclosure-controlled releases (Parquet, manifest.json, report.html)"
    );
    println!("  export/             what left the secure area: checked and approved releases");
    println!("  sites/              the two other invented sites of the pooled study");
    println!();
    println!(
        "open {} in a browser to read the monitoring study's report,",
        a.out
            .join("export")
            .join(format!("{site}-mtx-monitoring"))
            .join("report.html")
            .display()
    );
    println!(
        "and {} for the pooled one",
        pooled.join("report.html").display()
    );
    println!(
        "(a statistical summary is not clinical advice; a real release needs local IG approval)"
    );
    Ok(ExitCode::SUCCESS)
}
