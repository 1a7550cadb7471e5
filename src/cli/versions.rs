//! `convoy versions`: see which model versions a server holds, and roll them forward or back
//! through its control service.
//!
//! `list` asks the predictor port (`Catalog`, no token). The other commands call the control
//! service (`convoy.control.v1.Control`) with the bearer token, and print what changed.

use std::path::PathBuf;

use serde::Serialize;

use super::CliError;
use crate::service::api::control::{self as pb, control_client::ControlClient};
use crate::service::api::{self, predictor_client::PredictorClient};

/// Flags of `convoy versions`.
#[derive(Clone, Debug, clap::Args)]
pub struct VersionsArgs {
    #[command(subcommand)]
    pub action: Action,
    /// Print JSON instead of text.
    #[arg(long, global = true)]
    pub json: bool,
    #[command(flatten)]
    pub tls: super::TlsArgs,
}

/// Where the control service is and how to prove the right to use it.
#[derive(Clone, Debug, clap::Args)]
pub struct ControlTarget {
    /// The server's control address.
    #[arg(long, env = "CONVOY_CONTROL", default_value = "127.0.0.1:7172")]
    pub control: String,
    /// File whose first line is the control token (or set CONVOY_CONTROL_TOKEN).
    #[arg(long, env = "CONVOY_CONTROL_TOKEN_FILE")]
    pub token_file: Option<PathBuf>,
}

#[derive(Clone, Debug, clap::Subcommand)]
pub enum Action {
    /// Every model and version the server knows, with its state.
    List {
        /// The server's gRPC address.
        #[arg(long, env = "CONVOY_SERVER", default_value = "127.0.0.1:7171")]
        server: String,
    },
    /// Make a version active and hold it there (a rollback is activating the older version).
    Activate {
        model: String,
        version: String,
        #[command(flatten)]
        target: ControlTarget,
    },
    /// Let a model follow its highest version again (undoes `activate`'s hold).
    Follow {
        model: String,
        #[command(flatten)]
        target: ControlTarget,
    },
    /// Take a version out of service; if it was active, the next one takes over.
    Retire {
        model: String,
        version: String,
        #[command(flatten)]
        target: ControlTarget,
    },
    /// Look at the models folder now.
    Rescan {
        #[command(flatten)]
        target: ControlTarget,
    },
    /// Load (or load again) one bundle file of the models folder, by file name.
    Load {
        file_name: String,
        #[command(flatten)]
        target: ControlTarget,
    },
}

fn token(target: &ControlTarget) -> Result<String, CliError> {
    if let Some(path) = &target.token_file {
        let text = std::fs::read_to_string(path).map_err(|source| CliError::File {
            path: path.clone(),
            source,
        })?;
        return Ok(text.lines().next().unwrap_or("").trim().to_string());
    }
    match std::env::var("CONVOY_CONTROL_TOKEN") {
        Ok(t) if !t.trim().is_empty() => Ok(t.trim().to_string()),
        _ => Err(CliError::Usage(
            "the control service needs its token: --token-file FILE or CONVOY_CONTROL_TOKEN".into(),
        )),
    }
}

/// Runs `convoy versions`.
///
/// # Errors
/// Unreachable server, a refused call, a missing token.
pub fn versions(args: &VersionsArgs) -> Result<(), CliError> {
    super::block_on(async {
        match &args.action {
            Action::List { server } => list(server, &args.tls, args.json).await,
            action => {
                let report = control_call(action, &args.tls).await?;
                print_report(&report, args.json)
            }
        }
    })
}

async fn control_call(action: &Action, tls: &super::TlsArgs) -> Result<pb::ChangeReport, CliError> {
    let target = match action {
        Action::Activate { target, .. }
        | Action::Follow { target, .. }
        | Action::Retire { target, .. }
        | Action::Rescan { target }
        | Action::Load { target, .. } => target,
        Action::List { .. } => {
            return Err(CliError::Usage(
                "list does not use the control service".into(),
            ));
        }
    };
    let bearer: tonic::metadata::MetadataValue<tonic::metadata::Ascii> =
        format!("Bearer {}", token(target)?)
            .parse()
            .map_err(|_| CliError::Usage("the control token must be printable ASCII".into()))?;
    let mut client = ControlClient::with_interceptor(
        super::connect(&target.control, tls).await?,
        move |mut req: tonic::Request<()>| {
            req.metadata_mut().insert("authorization", bearer.clone());
            Ok(req)
        },
    );
    let reply = match action {
        Action::Activate { model, version, .. } => {
            client
                .activate(pb::ActivateRequest {
                    model: model.clone(),
                    version: version.clone(),
                })
                .await
        }
        Action::Follow { model, .. } => {
            client
                .follow_highest(pb::FollowHighestRequest {
                    model: model.clone(),
                })
                .await
        }
        Action::Retire { model, version, .. } => {
            client
                .retire(pb::RetireRequest {
                    model: model.clone(),
                    version: version.clone(),
                })
                .await
        }
        Action::Rescan { .. } => client.rescan(pb::RescanRequest {}).await,
        Action::Load { file_name, .. } => {
            client
                .load_file(pb::LoadFileRequest {
                    file_name: file_name.clone(),
                })
                .await
        }
        Action::List { .. } => {
            return Err(CliError::Usage(
                "list does not use the control service".into(),
            ));
        }
    };
    reply
        .map(tonic::Response::into_inner)
        .map_err(|s| super::rpc_error(&s))
}

#[derive(Serialize)]
struct ReportJson {
    loads: Vec<LoadJson>,
    switches: Vec<SwitchJson>,
    releases: Vec<ReleaseJson>,
}

#[derive(Serialize)]
struct LoadJson {
    origin: String,
    model: String,
    version: String,
    ok: bool,
    step: String,
    reason: String,
    took_us: u64,
}

#[derive(Serialize)]
struct SwitchJson {
    model: String,
    from_version: String,
    to_version: String,
    took_us: u64,
}

#[derive(Serialize)]
struct ReleaseJson {
    model: String,
    version: String,
    reason: String,
}

fn print_report(r: &pb::ChangeReport, json: bool) -> Result<(), CliError> {
    if json {
        let out = ReportJson {
            loads: r
                .loads
                .iter()
                .map(|l| LoadJson {
                    origin: l.origin.clone(),
                    model: l.model.clone(),
                    version: l.version.clone(),
                    ok: l.ok,
                    step: l.step.clone(),
                    reason: l.reason.clone(),
                    took_us: l.took_us,
                })
                .collect(),
            switches: r
                .switches
                .iter()
                .map(|s| SwitchJson {
                    model: s.model.clone(),
                    from_version: s.from_version.clone(),
                    to_version: s.to_version.clone(),
                    took_us: s.took_us,
                })
                .collect(),
            releases: r
                .releases
                .iter()
                .map(|x| ReleaseJson {
                    model: x.model.clone(),
                    version: x.version.clone(),
                    reason: x.reason.clone(),
                })
                .collect(),
        };
        return super::print_json(&out);
    }
    print!("{}", report_text(r));
    Ok(())
}

/// The text form of a change report: one line per load, switch and release.
pub fn report_text(r: &pb::ChangeReport) -> String {
    let mut out = String::new();
    for l in &r.loads {
        if l.ok {
            out += &format!(
                "loaded   {} {} from {} ({} ms)\n",
                l.model,
                l.version,
                l.origin,
                l.took_us / 1000
            );
        } else {
            let who = if l.model.is_empty() {
                l.origin.clone()
            } else {
                format!("{} {} ({})", l.model, l.version, l.origin)
            };
            out += &format!("refused  {who}: {}: {}\n", l.step, l.reason);
        }
    }
    for s in &r.switches {
        let from = if s.from_version.is_empty() {
            "-"
        } else {
            &s.from_version
        };
        out += &format!(
            "active   {} {} -> {} ({} ms)\n",
            s.model,
            from,
            s.to_version,
            s.took_us / 1000
        );
    }
    for x in &r.releases {
        out += &format!("retired  {} {}: {}\n", x.model, x.version, x.reason);
    }
    if out.is_empty() {
        out = "nothing changed\n".into();
    }
    out
}

async fn list(server: &str, tls: &super::TlsArgs, json: bool) -> Result<(), CliError> {
    let mut client = PredictorClient::new(super::connect(server, tls).await?);
    let cat = client
        .catalog(api::CatalogRequest {})
        .await
        .map_err(|s| super::rpc_error(&s))?
        .into_inner();
    if json {
        #[derive(Serialize)]
        struct Row<'a> {
            model: &'a str,
            version: &'a str,
            state: &'a str,
            reason: &'a str,
            note: &'a str,
            origin: &'a str,
            pinned: bool,
        }
        let rows: Vec<Row> = cat
            .models
            .iter()
            .flat_map(|m| {
                m.versions.iter().map(move |v| Row {
                    model: &m.name,
                    version: &v.version,
                    state: &v.state,
                    reason: &v.reason,
                    note: &v.note,
                    origin: &v.origin,
                    pinned: m.pinned_version == v.version,
                })
            })
            .collect();
        return super::print_json(&rows);
    }
    let mut table = vec![[
        "MODEL".to_string(),
        "VERSION".into(),
        "STATE".into(),
        "FROM".into(),
        "DETAIL".into(),
    ]];
    for m in &cat.models {
        for v in &m.versions {
            let mut detail = v.reason.clone();
            if m.pinned_version == v.version {
                detail = join_detail(&detail, "pinned");
            }
            detail = join_detail(&detail, &v.note);
            table.push([
                m.name.clone(),
                v.version.clone(),
                v.state.clone(),
                v.origin.clone(),
                detail,
            ]);
        }
    }
    for f in &cat.unreadable_files {
        table.push([
            "-".into(),
            "-".into(),
            "refused".into(),
            f.file.clone(),
            f.reason.clone(),
        ]);
    }
    let widths: Vec<usize> = (0..4)
        .map(|c| {
            table
                .iter()
                .map(|r| r[c].chars().count())
                .max()
                .unwrap_or(0)
        })
        .collect();
    for row in &table {
        let mut line = String::new();
        for (c, w) in widths.iter().enumerate() {
            line += &format!("{:<w$}  ", row[c], w = w);
        }
        line += &row[4];
        println!("{}", line.trim_end());
    }
    Ok(())
}

fn join_detail(a: &str, b: &str) -> String {
    match (a.is_empty(), b.is_empty()) {
        (true, _) => b.to_string(),
        (false, true) => a.to_string(),
        (false, false) => format!("{a}; {b}"),
    }
}
