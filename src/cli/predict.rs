//! `convoy predict`: send images or `.npy` tensors to a server, print the ranked classes.

use std::path::{Path, PathBuf};

use serde::Serialize;

use super::CliError;
use crate::npy::read_npy_file;
use crate::service::api::{self, predictor_client::PredictorClient, sample::Data};

/// Flags of `convoy predict`.
#[derive(Clone, Debug, clap::Args)]
pub struct PredictArgs {
    /// Server address, e.g. 127.0.0.1:7171 or http://host:7171.
    #[arg(long, env = "CONVOY_SERVER", default_value = "127.0.0.1:7171")]
    pub server: String,
    /// Model name (default: the server's default model).
    #[arg(long, default_value = "")]
    pub model: String,
    /// Model version (default: the active one).
    #[arg(long, default_value = "")]
    pub version: String,
    /// Ranked classes per sample.
    #[arg(long, default_value_t = 3)]
    pub top: u32,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Image files (sent as they are) and .npy files (each row of the first axis is a sample).
    #[arg(required = true)]
    pub files: Vec<PathBuf>,
    #[command(flatten)]
    pub tls: super::TlsArgs,
}

#[derive(Serialize)]
struct Row {
    file: String,
    /// Row within a .npy file; 0 for images.
    index: usize,
    top: Vec<RankedJson>,
}

#[derive(Serialize)]
struct RankedJson {
    class_index: u32,
    label: String,
    probability: f32,
}

#[derive(Serialize)]
struct Report {
    model: String,
    version: String,
    samples: Vec<Row>,
    queued_us: u64,
    compute_us: u64,
    total_us: u64,
}

fn samples_of(path: &Path) -> Result<Vec<api::Sample>, CliError> {
    let is_npy = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("npy"));
    if is_npy {
        let a = read_npy_file(path)?;
        if a.shape.len() < 2 {
            return Err(CliError::Usage(format!(
                "{}: a .npy batch needs a batch axis and a sample shape, got {:?}",
                path.display(),
                a.shape
            )));
        }
        let per: usize = a.shape[1..].iter().product();
        let shape: Vec<u32> = a.shape[1..].iter().map(|&d| d as u32).collect();
        Ok(a.data
            .chunks(per.max(1))
            .map(|row| api::Sample {
                data: Some(Data::Tensor(api::Tensor {
                    shape: shape.clone(),
                    f32_le: row.iter().flat_map(|v| v.to_le_bytes()).collect(),
                })),
            })
            .collect())
    } else {
        let bytes = std::fs::read(path).map_err(|source| CliError::File {
            path: path.to_path_buf(),
            source,
        })?;
        Ok(vec![api::Sample {
            data: Some(Data::EncodedImage(bytes)),
        }])
    }
}

pub fn predict(args: &PredictArgs) -> Result<(), CliError> {
    let mut samples = Vec::new();
    let mut origin = Vec::new();
    for f in &args.files {
        let s = samples_of(f)?;
        for i in 0..s.len() {
            origin.push((f.display().to_string(), i));
        }
        samples.extend(s);
    }
    let reply = super::block_on(async {
        let mut client = PredictorClient::new(super::connect(&args.server, &args.tls).await?)
            .max_decoding_message_size(64 << 20)
            .max_encoding_message_size(64 << 20);
        client
            .predict(api::PredictRequest {
                model: args.model.clone(),
                version: args.version.clone(),
                samples,
                top_k: args.top,
                all_scores: false,
                tag: String::new(),
            })
            .await
            .map(tonic::Response::into_inner)
            .map_err(|s| super::rpc_error(&s))
    })?;
    let timing = reply.timing.unwrap_or_default();
    let report = Report {
        model: reply.model,
        version: reply.version,
        samples: reply
            .outcomes
            .into_iter()
            .zip(origin)
            .map(|(o, (file, index))| Row {
                file,
                index,
                top: o
                    .top
                    .into_iter()
                    .map(|r| RankedJson {
                        class_index: r.class_index,
                        label: r.label,
                        probability: r.probability,
                    })
                    .collect(),
            })
            .collect(),
        queued_us: timing.queued_us,
        compute_us: timing.compute_us,
        total_us: timing.total_us,
    };
    let text = if args.json {
        // Plain data: serialising it cannot fail.
        serde_json::to_string_pretty(&report).expect("report serialises") + "\n"
    } else {
        render(&report)
    };
    print!("{text}");
    Ok(())
}

fn render(r: &Report) -> String {
    use std::fmt::Write as _;
    let mut s = String::new();
    let width = r
        .samples
        .iter()
        .map(|x| x.file.len() + 4)
        .max()
        .unwrap_or(4)
        .clamp(6, 60);
    // Writing to a String cannot fail.
    let _ = writeln!(s, "model {} version {}", r.model, r.version);
    let _ = writeln!(
        s,
        "{:<width$}  {:<20} {:>11}",
        "sample", "class", "probability"
    );
    for row in &r.samples {
        let name = if row.file.ends_with(".npy") {
            format!("{}[{}]", row.file, row.index)
        } else {
            row.file.clone()
        };
        for (i, t) in row.top.iter().enumerate() {
            let first = if i == 0 { name.as_str() } else { "" };
            let _ = writeln!(
                s,
                "{first:<width$}  {:<20} {:>11.4}",
                t.label, t.probability
            );
        }
    }
    let _ = writeln!(
        s,
        "server time {:.1} ms (queued {:.1} ms, compute {:.1} ms)",
        r.total_us as f64 / 1e3,
        r.queued_us as f64 / 1e3,
        r.compute_us as f64 / 1e3
    );
    s
}
