//! The safety caution that goes with every verdict Tessera prints or serves: the one
//! place its wording lives. The command-line tools (`tessera`, `tessera-worker`), the
//! server's reports, coverage answers, OpenAPI description, dashboard and demo all
//! take it from here.
//!
//! Why it is needed: a "safe" verdict is a proof about the loop the spec describes
//! (README "Closed-loop semantics"), not about the deployed system. The networks are
//! evaluated in exact real arithmetic on their stored weights, so the rounding of a
//! float32 runtime is outside the proof, as is any plant behaviour beyond the stated
//! dynamics, disturbance and noise bounds.

/// The caution in full: reports (Markdown and JSON), the coverage answer, the
/// dashboard, the OpenAPI description and the demo's closing line.
pub const CAUTION: &str = "These results are engineering evidence under the spec's stated model assumptions: \
the dynamics, the disturbance and noise bounds, the envelope and horizon, and the controller semantics \
(the networks as uploaded, evaluated in exact real arithmetic on their stored weights; the rounding of a \
float32 runtime is not modelled). They are not a certification. They defer to the applicable safety \
standards and to the responsible certification authority.";

/// The one-line form printed under a verdict on the command line (`tessera status`,
/// `wait`, `gate`, `tessera-worker check`, `replay`).
pub const CAUTION_LINE: &str = "caution: engineering evidence under the spec's stated model assumptions \
(dynamics, disturbance and noise bounds, controller semantics; float32 runtime rounding not modelled), \
not a certification; defer to the applicable safety standards and the responsible certification authority.";

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn both_forms_name_every_assumption_and_the_authority() {
        for text in [CAUTION, CAUTION_LINE] {
            for needle in [
                "engineering evidence",
                "model assumptions",
                "dynamics",
                "disturbance and noise bounds",
                "controller semantics",
                "float32",
                "not modelled",
                "not a certification",
                "applicable safety standards",
                "responsible certification authority",
            ] {
                assert!(text.contains(needle), "'{needle}' missing from: {text}");
            }
            // Served inside HTML and JSON as is, and printed as one line.
            assert!(!text.contains(['<', '>', '&', '"', '\n']), "{text}");
        }
    }
}
