//! The generated gRPC types of `proto/convoy/v1/predictor.proto` (package `convoy.v1`), and
//! of the control service in [`control`].

#![allow(clippy::all, clippy::pedantic, missing_docs)]

tonic::include_proto!("convoy.v1");

/// The encoded descriptor set of the service, for gRPC server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] =
    include_bytes!(concat!(env!("OUT_DIR"), "/convoy_v1_descriptor.bin"));

/// The generated types of `proto/convoy/v1/control.proto` (package `convoy.control.v1`).
pub mod control {
    #![allow(clippy::all, clippy::pedantic, missing_docs)]

    tonic::include_proto!("convoy.control.v1");

    /// The encoded descriptor set of the control service, for reflection on the control port.
    pub const FILE_DESCRIPTOR_SET: &[u8] = include_bytes!(concat!(
        env!("OUT_DIR"),
        "/convoy_control_v1_descriptor.bin"
    ));
}
