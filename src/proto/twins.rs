//! What prost generates for the two hand-written messages, field for field: the reference the
//! tests check [`super::messages`] against, and the message types of the benchmarks' stock
//! transport floor.

/// prost's derived `candor.v1.CalibrateRequest`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct GeneratedRequest {
    #[prost(string, tag = "1")]
    pub model: String,
    #[prost(float, repeated, tag = "2")]
    pub logits: Vec<f32>,
    #[prost(string, tag = "3")]
    pub request_id: String,
    #[prost(uint32, tag = "4")]
    pub top_k: u32,
    #[prost(string, tag = "5")]
    pub map_version: String,
}

/// prost's derived `candor.v1.CalibrateResponse`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct GeneratedResponse {
    #[prost(float, repeated, tag = "1")]
    pub probabilities: Vec<f32>,
    #[prost(uint32, tag = "2")]
    pub predicted_class: u32,
    #[prost(float, tag = "3")]
    pub confidence: f32,
    #[prost(int32, tag = "4")]
    pub decision: i32,
    #[prost(float, tag = "5")]
    pub threshold: f32,
    #[prost(string, tag = "6")]
    pub map_version: String,
    #[prost(string, tag = "7")]
    pub request_id: String,
    #[prost(uint32, repeated, tag = "8")]
    pub classes: Vec<u32>,
    #[prost(int32, tag = "9")]
    pub route: i32,
    #[prost(bool, tag = "10")]
    pub audit: bool,
}
