//! Arbitrary bytes as the body of a `Predict` call: protobuf-decoded into a `PredictRequest`,
//! then what the RPC does before queueing — resolve the model and version it names against a
//! registry holding the demo model, then `check_request` (sample count, each sample prepared,
//! drift statistics) with the default limits.
#![no_main]

use std::sync::OnceLock;

use convoy::registry::{LoadSettings, Policy, Registry};
use convoy::service::DEMO_BUNDLE;
use convoy::service::api::PredictRequest;
use convoy::service::predictor::{RequestLimits, check_request};
use libfuzzer_sys::fuzz_target;
use prost::Message;

fn registry() -> &'static Registry {
    static R: OnceLock<Registry> = OnceLock::new();
    R.get_or_init(|| {
        let r = Registry::new(LoadSettings::default(), Policy::default(), None);
        r.load_bytes(DEMO_BUNDLE.to_vec(), "built-in demo");
        r
    })
}

fuzz_target!(|data: &[u8]| {
    let Ok(req) = PredictRequest::decode(data) else {
        return;
    };
    let Ok(model) = registry().resolve(&req.model, &req.version) else {
        return;
    };
    if let Ok(prepared) = check_request(&model, &req.samples, &RequestLimits::default()) {
        assert_eq!(
            prepared.inputs().len(),
            req.samples.len() * model.input_len()
        );
        assert!(prepared.inputs().iter().all(|v| v.is_finite()));
    }
});
