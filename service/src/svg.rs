//! What the SVG pictures (report, comparison, calibration fit) share.

/// Escapes text for SVG element content and attribute values.
pub fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}
