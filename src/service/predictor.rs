//! The `Predictor` gRPC service: resolve the model, prepare samples, compute, rank.

use std::pin::Pin;
use std::sync::Arc;
use std::time::Instant;

use tokio::sync::{Semaphore, mpsc};
use tokio_stream::wrappers::ReceiverStream;
use tokio_stream::{Stream, StreamExt};
use tonic::{Request, Response, Status, Streaming};

use super::api::{self, predictor_server::Predictor, sample::Data};
use super::drain::Admission;
use super::error::ServiceError;
use crate::bundle::manifest::{OutputKind, spelling};
use crate::drift::{SampleStats, Verdict};
use crate::prepare::{ImageLimits, PrepareError, prepare_image, prepare_tensor};
use crate::registry::{LookupError, ModelVersion, Registry, VersionState};
use crate::scheduler::{Scheduler, SubmitError};
use crate::telemetry;

/// Request limits, each with a safe default.
#[derive(Clone, Debug)]
pub struct RequestLimits {
    pub max_samples_per_request: usize,
    pub image: ImageLimits,
    /// Requests of one `PredictStream` computed at the same time.
    pub stream_concurrency: usize,
}

impl Default for RequestLimits {
    fn default() -> Self {
        RequestLimits {
            max_samples_per_request: 64,
            image: ImageLimits::default(),
            stream_concurrency: 16,
        }
    }
}

/// State shared by every call.
pub(crate) struct Shared {
    pub registry: Arc<Registry>,
    pub scheduler: Arc<Scheduler>,
    pub limits: RequestLimits,
    /// Significance level of drift reports.
    pub drift_alpha: f64,
    /// Requests accepted and not yet answered; closed when the server drains.
    pub admission: Admission,
}

/// The service object handed to tonic.
#[derive(Clone)]
pub struct PredictorService {
    shared: Arc<Shared>,
}

impl PredictorService {
    pub(crate) fn new(shared: Arc<Shared>) -> Self {
        PredictorService { shared }
    }
}

impl Shared {
    /// One request, counted in the metrics whatever its outcome.
    async fn predict(
        &self,
        req: api::PredictRequest,
        received: Instant,
        deadline: Option<tokio::time::Instant>,
    ) -> Result<api::PredictReply, ServiceError> {
        // A guard, so a request whose caller goes away (the future is dropped) still leaves.
        let _in_flight = telemetry::InFlight::start();
        let samples = req.samples.len();
        let mut labels = (
            telemetry::UNKNOWN.to_string(),
            telemetry::UNKNOWN.to_string(),
        );
        // Counted until it is answered, so that a draining server waits for it.
        let result = match self.admission.admit() {
            Some(_admitted) => {
                self.predict_inner(req, received, deadline, &mut labels)
                    .await
            }
            None => Err(ServiceError::ShuttingDown),
        };
        let code = match &result {
            Ok(_) => tonic::Code::Ok,
            Err(e) => e.code(),
        };
        telemetry::request_finished(&labels.0, &labels.1, code, samples, received.elapsed());
        result
    }

    /// The request's inputs prepared for `model`: those prepared for an earlier choice when
    /// it takes its input the same way (its drift statistics kept only if they mean the same),
    /// otherwise checked and decoded anew off the async threads.
    async fn prepare(
        &self,
        model: &Arc<ModelVersion>,
        samples: &Arc<Vec<api::Sample>>,
        earlier: Option<(Arc<ModelVersion>, Prepared)>,
    ) -> Result<Prepared, ServiceError> {
        if let Some((before, mut ready)) = earlier
            && before.manifest.input == model.manifest.input
        {
            let same = match (&before.drift, &model.drift) {
                (Some(a), Some(b)) => a.schema == b.schema,
                _ => false,
            };
            if !same {
                ready.stats = None;
            }
            return Ok(ready);
        }
        let (prep_model, samples) = (Arc::clone(model), Arc::clone(samples));
        let limits = self.limits.clone();
        // Decoding and resizing images is CPU work: keep it off the async I/O threads.
        tokio::task::spawn_blocking(move || check_request(&prep_model, &samples, &limits))
            .await
            .map_err(|e| ServiceError::Internal(format!("preparation task failed: {e}")))?
    }

    async fn predict_inner(
        &self,
        mut req: api::PredictRequest,
        received: Instant,
        deadline: Option<tokio::time::Instant>,
        labels: &mut (String, String),
    ) -> Result<api::PredictReply, ServiceError> {
        let count = req.samples.len();
        let samples = Arc::new(std::mem::take(&mut req.samples));
        // Prepared inputs and the version they were prepared for.
        let mut prepared: Option<(Arc<ModelVersion>, Prepared)> = None;
        // A request that names no version and meets a version being retired between choosing
        // it and queueing (a swap in between) chooses again; twice in a row takes two swaps
        // within one request's preparation, and a third attempt is given up as unavailable.
        let mut attempts = 0;
        let (model, pending, stats) = loop {
            attempts += 1;
            let model = self.registry.resolve(&req.model, &req.version)?;
            *labels = (model.name.clone(), model.version.clone());
            let ready = self.prepare(&model, &samples, prepared.take()).await?;
            match self.scheduler.submit(
                Arc::clone(&model),
                Arc::clone(&ready.inputs),
                count,
                deadline,
            ) {
                Ok(pending) => break (model, pending, ready.stats),
                Err(SubmitError::Retired { .. }) if req.version.is_empty() && attempts < 3 => {
                    prepared = Some((model, ready));
                }
                Err(SubmitError::Retired {
                    model: name,
                    version,
                }) => {
                    return Err(ServiceError::Lookup(LookupError::UnknownVersion {
                        name,
                        version,
                        available: "(retired while the request waited; ask Catalog)".into(),
                    }));
                }
                Err(e) => return Err(e.into()),
            }
        };
        let computed = pending
            .await
            .map_err(|_| ServiceError::Internal("the compute thread dropped the job".into()))??;
        telemetry::queue_wait(&model.name, &model.version, computed.queued);
        let classes = model.output_len();
        let top_k = match req.top_k {
            0 => 5,
            k => k as usize,
        }
        .min(classes);
        let mut stats = stats.map(|s| s.into_iter());
        let outcomes = computed
            .outputs
            .chunks(classes)
            .map(|raw| {
                let probs = probabilities(&model, raw);
                if let (Some(monitor), Some(mut sample)) =
                    (&model.drift, stats.as_mut().and_then(Iterator::next))
                    && monitor.schema.compute_output(&probs, &mut sample).is_ok()
                {
                    monitor.record(&sample);
                }
                outcome(&model, probs, top_k, req.all_scores)
            })
            .collect();
        Ok(api::PredictReply {
            model: model.name.clone(),
            version: model.version.clone(),
            outcomes,
            timing: Some(api::Timing {
                queued_us: computed.queued.as_micros() as u64,
                compute_us: computed.compute.as_micros() as u64,
                batch_size: computed.batch_size as u32,
                total_us: received.elapsed().as_micros() as u64,
            }),
            tag: req.tag,
            problem: None,
        })
    }

    fn catalog(&self) -> api::CatalogReply {
        let models = self
            .registry
            .snapshot()
            .into_iter()
            .map(|(name, slot)| {
                let active = slot.active().map(|m| m.version.clone()).unwrap_or_default();
                let versions = slot
                    .versions
                    .iter()
                    .map(|v| {
                        let state = match &v.state {
                            VersionState::Ready if v.version == active => "active",
                            s => s.word(),
                        };
                        let reason = match &v.state {
                            VersionState::Refused(r) => r.to_string(),
                            VersionState::Retired { reason } => reason.clone(),
                            VersionState::Loading | VersionState::Ready => String::new(),
                        };
                        let mut e = api::VersionEntry {
                            version: v.version.clone(),
                            state: state.into(),
                            reason,
                            bundle_sha256: v.bundle_sha256.clone(),
                            origin: v.origin.clone(),
                            note: v.note.clone(),
                            ..Default::default()
                        };
                        if let Some(m) = &v.model {
                            fill_version(&mut e, m);
                        }
                        e
                    })
                    .collect();
                api::ModelEntry {
                    name,
                    active_version: active,
                    versions,
                    pinned_version: slot.pinned.clone().unwrap_or_default(),
                }
            })
            .collect();
        api::CatalogReply {
            models,
            default_model: self.registry.default_model().unwrap_or_default(),
            unreadable_files: self
                .registry
                .unreadable()
                .into_iter()
                .map(|u| api::UnreadableFile {
                    file: u.origin,
                    reason: u.refusal.to_string(),
                })
                .collect(),
        }
    }
}

fn fill_version(e: &mut api::VersionEntry, m: &ModelVersion) {
    let spec = &m.manifest.input;
    e.description = m.manifest.description.clone();
    e.input_shape = spec.shape.iter().map(|&d| d as u32).collect();
    e.image = spec.image.as_ref().map(|i| api::ImageInput {
        color: spelling(&i.color),
        width: i.width as u32,
        height: i.height as u32,
        resize_filter: spelling(&i.resize_filter),
        fit: spelling(&i.fit),
        scale: i.scale,
        mean: i.mean.clone(),
        std: i.std.clone(),
    });
    e.labels = m.labels.clone();
    e.output_kind = spelling(&m.output_kind);
    e.parameters = m.parameters;
    e.multiply_adds = m.multiply_adds;
    e.bundle_sha256 = m.bundle_sha256.clone();
    e.created = m.manifest.created.clone();
}

/// The drift report of `model` in its wire form.
fn drift_reply(model: &ModelVersion, alpha: f64) -> Result<api::DriftReply, ServiceError> {
    let mut reply = api::DriftReply {
        model: model.name.clone(),
        version: model.version.clone(),
        ..Default::default()
    };
    let Some(monitor) = &model.drift else {
        reply.note = model.drift_note.clone();
        return Ok(reply);
    };
    let report = monitor
        .window
        .report(alpha)
        .map_err(|e| ServiceError::Internal(format!("drift report: {e}")))?;
    let verdict = |v: Verdict| spelling(&v);
    reply.monitored = true;
    reply.window_capacity = monitor.window.capacity() as u32;
    reply.window_samples = report.samples as u32;
    reply.samples_seen = monitor.seen();
    reply.reference_samples = monitor.baseline.samples;
    reply.alpha = report.alpha;
    reply.ks_level = report.ks_level;
    reply.drift = report.drift;
    reply.statistics = report
        .statistics
        .iter()
        .map(|s| {
            let r = monitor.baseline.statistic(&s.name);
            api::StatisticDrift {
                name: s.name.clone(),
                window: s.window as u32,
                psi: s.psi,
                ks_statistic: s.ks.map(|k| k.statistic),
                ks_p_value: s.ks.map(|k| k.p_value),
                ks_significant: s.ks_significant,
                out_of_range: s.out_of_range,
                non_finite: s.non_finite,
                verdict: verdict(s.verdict),
                bin_edges: r.map_or_else(Vec::new, |r| {
                    r.edges.iter().map(|&e| f64::from(e)).collect()
                }),
                reference_counts: r.map_or_else(Vec::new, |r| r.bin_counts.clone()),
                window_counts: s.window_bins.clone(),
                reference_min: r.map_or(0.0, |r| f64::from(r.min)),
                reference_max: r.map_or(0.0, |r| f64::from(r.max)),
            }
        })
        .collect();
    reply.predicted_class = report.predicted_class.as_ref().map(|c| api::ClassDrift {
        window: c.window as u32,
        psi: c.psi,
        chi_square: c.chi_square.map(|x| x.statistic),
        degrees_of_freedom: c.chi_square.map_or(0, |x| x.dof as u32),
        p_value: c.chi_square.map(|x| x.p_value),
        significant: c.significant,
        verdict: verdict(c.verdict),
        reference_counts: monitor.baseline.class_counts.clone(),
        window_counts: c.window_counts.clone(),
        labels: model.labels.clone(),
    });
    Ok(reply)
}

/// A request's samples as model input (back to back), with each sample's input-side drift
/// statistics when the version is monitored.
pub struct Prepared {
    inputs: Arc<Vec<f32>>,
    stats: Option<Vec<SampleStats>>,
}

impl Prepared {
    /// The model input of every sample, back to back.
    pub fn inputs(&self) -> &[f32] {
        &self.inputs
    }
}

/// Every check a request's samples pass before they are queued, and their preparation: at
/// least one sample, at most `limits.max_samples_per_request`, then each sample turned into
/// `model`'s input. The `Predict` and `PredictStream` calls run exactly this (on a blocking
/// thread, as images are CPU work); it needs no server, so tests and fuzzing drive it directly.
///
/// # Errors
/// [`ServiceError::NoSamples`], [`ServiceError::TooManySamples`],
/// [`ServiceError::EmptySample`] and [`ServiceError::Sample`] naming the first bad sample.
pub fn check_request(
    model: &ModelVersion,
    samples: &[api::Sample],
    limits: &RequestLimits,
) -> Result<Prepared, ServiceError> {
    let count = samples.len();
    if count == 0 {
        return Err(ServiceError::NoSamples);
    }
    if count > limits.max_samples_per_request {
        return Err(ServiceError::TooManySamples {
            count,
            limit: limits.max_samples_per_request,
        });
    }
    prepare_all(model, samples, &limits.image)
}

/// Turns every sample into model input, and computes the input half of its drift statistics
/// (on the same blocking thread, while the sample is in cache).
fn prepare_all(
    model: &ModelVersion,
    samples: &[api::Sample],
    limits: &ImageLimits,
) -> Result<Prepared, ServiceError> {
    let in_len = model.input_len();
    let shape = &model.manifest.input.shape;
    let mut inputs = vec![0.0f32; samples.len() * in_len];
    let mut stats = model.drift.as_ref().map(|m| {
        (0..samples.len())
            .map(|_| m.schema.new_stats())
            .collect::<Vec<_>>()
    });
    for (index, (sample, out)) in samples.iter().zip(inputs.chunks_mut(in_len)).enumerate() {
        let facts = match &sample.data {
            Some(Data::EncodedImage(bytes)) => match &model.manifest.input.image {
                Some(prep) => {
                    let started = Instant::now();
                    let r = prepare_image(bytes, prep, limits, out);
                    telemetry::image_prepared(&model.name, started.elapsed());
                    r.map(Some)
                }
                None => Err(PrepareError::ImageNotAccepted),
            },
            Some(Data::Tensor(t)) => prepare_tensor(&t.shape, &t.f32_le, shape, out).map(|()| None),
            None => return Err(ServiceError::EmptySample { index }),
        }
        .map_err(|source| ServiceError::Sample { index, source })?;
        if let (Some(monitor), Some(all)) = (&model.drift, stats.as_mut()) {
            // Only a length mismatch fails, and `out` has the model's input length.
            if monitor
                .schema
                .compute_input(out, facts, &mut all[index])
                .is_err()
            {
                stats = None;
            }
        }
    }
    Ok(Prepared {
        inputs: Arc::new(inputs),
        stats,
    })
}

/// The probability of every class: the softmax of logits, or the graph's own probabilities.
fn probabilities(model: &ModelVersion, raw: &[f32]) -> Vec<f32> {
    match model.output_kind {
        OutputKind::Probabilities => raw.to_vec(),
        OutputKind::Logits => softmax(raw),
    }
}

/// Probabilities, ranked.
fn outcome(model: &ModelVersion, probs: Vec<f32>, top_k: usize, all_scores: bool) -> api::Outcome {
    let mut order: Vec<usize> = (0..probs.len()).collect();
    // Highest first; ties keep class order. NaN (which only a NaN input can produce) sorts last.
    order.sort_by(|&a, &b| {
        probs[b]
            .partial_cmp(&probs[a])
            .unwrap_or_else(|| probs[a].is_nan().cmp(&probs[b].is_nan()))
    });
    api::Outcome {
        top: order
            .iter()
            .take(top_k)
            .map(|&i| api::Ranked {
                class_index: i as u32,
                label: model.labels.get(i).cloned().unwrap_or_default(),
                probability: probs[i],
            })
            .collect(),
        scores: if all_scores { probs } else { Vec::new() },
    }
}

/// Numerically stable softmax (subtract the maximum first).
fn softmax(x: &[f32]) -> Vec<f32> {
    let max = x.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let exps: Vec<f32> = x.iter().map(|v| (v - max).exp()).collect();
    let sum: f32 = exps.iter().sum();
    exps.iter().map(|e| e / sum).collect()
}

/// The caller's deadline from the `grpc-timeout` header (gRPC over HTTP/2 specification:
/// up to 8 digits and a unit, H M S m u n).
fn deadline_of(metadata: &tonic::metadata::MetadataMap) -> Option<tokio::time::Instant> {
    let v = metadata.get("grpc-timeout")?.to_str().ok()?;
    let (digits, unit) = v.split_at(v.len().checked_sub(1)?);
    let n: u64 = digits.parse().ok()?;
    let d = match unit {
        "H" => std::time::Duration::from_secs(n.saturating_mul(3600)),
        "M" => std::time::Duration::from_secs(n.saturating_mul(60)),
        "S" => std::time::Duration::from_secs(n),
        "m" => std::time::Duration::from_millis(n),
        "u" => std::time::Duration::from_micros(n),
        "n" => std::time::Duration::from_nanos(n),
        _ => return None,
    };
    tokio::time::Instant::now().checked_add(d)
}

type ReplyStream = Pin<Box<dyn Stream<Item = Result<api::PredictReply, Status>> + Send>>;

#[tonic::async_trait]
impl Predictor for PredictorService {
    async fn predict(
        &self,
        request: Request<api::PredictRequest>,
    ) -> Result<Response<api::PredictReply>, Status> {
        let received = Instant::now();
        let deadline = deadline_of(request.metadata());
        let reply = self
            .shared
            .predict(request.into_inner(), received, deadline)
            .await
            .inspect_err(|e| tracing::debug!(error = %e, "predict refused"))?;
        Ok(Response::new(reply))
    }

    type PredictStreamStream = ReplyStream;

    async fn predict_stream(
        &self,
        request: Request<Streaming<api::PredictRequest>>,
    ) -> Result<Response<Self::PredictStreamStream>, Status> {
        let mut incoming = request.into_inner();
        let concurrency = self.shared.limits.stream_concurrency.max(1);
        // Bounded both ways: at most `concurrency` requests in flight, and as many replies
        // buffered; a slow reader slows its own stream only.
        let (tx, rx) = mpsc::channel(concurrency);
        let shared = Arc::clone(&self.shared);
        tokio::spawn(async move {
            let permits = Arc::new(Semaphore::new(concurrency));
            while let Some(item) = incoming.next().await {
                let req = match item {
                    Ok(r) => r,
                    Err(status) => {
                        let _ = tx.send(Err(status)).await;
                        break;
                    }
                };
                let Ok(permit) = Arc::clone(&permits).acquire_owned().await else {
                    break;
                };
                let (shared, tx) = (Arc::clone(&shared), tx.clone());
                tokio::spawn(async move {
                    let tag = req.tag.clone();
                    let reply = match shared.predict(req, Instant::now(), None).await {
                        Ok(r) => r,
                        Err(e) => api::PredictReply {
                            tag,
                            problem: Some(api::Problem {
                                code: e.code() as i32,
                                message: e.to_string(),
                            }),
                            ..Default::default()
                        },
                    };
                    let _ = tx.send(Ok(reply)).await;
                    drop(permit);
                });
            }
        });
        Ok(Response::new(Box::pin(ReceiverStream::new(rx))))
    }

    async fn catalog(
        &self,
        _request: Request<api::CatalogRequest>,
    ) -> Result<Response<api::CatalogReply>, Status> {
        Ok(Response::new(self.shared.catalog()))
    }

    async fn drift(
        &self,
        request: Request<api::DriftRequest>,
    ) -> Result<Response<api::DriftReply>, Status> {
        let model = self
            .shared
            .registry
            .resolve(&request.into_inner().model, "")
            .map_err(ServiceError::from)?;
        let alpha = self.shared.drift_alpha;
        // The tests sort the window and may run exact KS distributions: CPU work.
        let reply = tokio::task::spawn_blocking(move || drift_reply(&model, alpha))
            .await
            .map_err(|e| ServiceError::Internal(format!("drift report task failed: {e}")))??;
        Ok(Response::new(reply))
    }
}

#[cfg(test)]
mod tests {
    use super::softmax;

    #[test]
    fn softmax_of_equal_logits_is_uniform() {
        // Closed form: softmax of k equal values is 1/k each.
        let p = softmax(&[3.0, 3.0, 3.0, 3.0]);
        assert!(p.iter().all(|&v| (v - 0.25).abs() < 1e-7));
    }
}
