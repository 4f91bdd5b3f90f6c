//! The gRPC surface: thin adapters between the wire contract and the
//! monitor. Each service lives in its own file; every method converts the
//! request (validation errors become a `Status` there), calls the monitor,
//! and converts the result back.

pub mod boards;
pub mod events;
pub mod intake;
pub mod registry;
pub mod scoring;
pub mod status;

pub mod pb {
    //! Generated from proto/plumbline/v1/plumbline.proto.
    #![allow(clippy::all, missing_docs)]
    tonic::include_proto!("plumbline.v1");

    /// Descriptor set served by reflection.
    pub const FILE_DESCRIPTOR_SET: &[u8] =
        tonic::include_file_descriptor_set!("plumbline_descriptor");
}
