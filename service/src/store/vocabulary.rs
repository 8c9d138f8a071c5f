//! The words every layer shares: the status of a fit attempt, the status and trigger of a
//! run. Each is one enum; its text form (in the database, JSON and screens) comes from
//! `as_str`, serde and sqlx derive from the same spelling, so no layer compares strings.

use serde::Serialize;

/// What became of a fit attempt (`fits.status`). An attempt counts as failed until it
/// is shown otherwise, hence the default.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, sqlx::Type)]
#[serde(rename_all = "snake_case")]
#[sqlx(type_name = "TEXT", rename_all = "snake_case")]
pub enum FitStatus {
    /// Passed the gate; a version that serves until a newer one is published.
    Published,
    /// Failed the convergence gate; the previous version keeps serving.
    Rejected,
    /// Could not be fitted (bad data, a model error).
    #[default]
    Failed,
}

/// How a run ended, or that it is still going (`runs.status`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, sqlx::Type)]
#[serde(rename_all = "snake_case")]
#[sqlx(type_name = "TEXT", rename_all = "snake_case")]
pub enum RunStatus {
    Running,
    Succeeded,
    /// A file or series had a problem; the rest was done.
    Partial,
    /// The run itself failed.
    Failed,
    /// Stopped by a shutdown request, or found `running` after its process died.
    Abandoned,
    /// A tick that came while the previous run was still going: no work was done.
    Skipped,
}

/// What started a run (`runs.trigger`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, sqlx::Type)]
#[serde(rename_all = "kebab-case")]
#[sqlx(type_name = "TEXT", rename_all = "kebab-case")]
pub enum RunTrigger {
    /// A tick of `serve`'s schedule.
    Schedule,
    /// `serve` at start, for a tick missed while it was down.
    CatchUp,
    /// A person or an outside scheduler ran a command.
    Manual,
    /// `tidemark demo`.
    Demo,
}

macro_rules! text_form {
    ($ty:ty { $($variant:ident => $text:literal),* $(,)? }) => {
        impl $ty {
            pub fn as_str(&self) -> &'static str {
                match self {
                    $(<$ty>::$variant => $text),*
                }
            }
        }
        impl std::fmt::Display for $ty {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str(self.as_str())
            }
        }
    };
}

text_form!(FitStatus { Published => "published", Rejected => "rejected", Failed => "failed" });
text_form!(RunStatus {
    Running => "running",
    Succeeded => "succeeded",
    Partial => "partial",
    Failed => "failed",
    Abandoned => "abandoned",
    Skipped => "skipped",
});
text_form!(RunTrigger {
    Schedule => "schedule",
    CatchUp => "catch-up",
    Manual => "manual",
    Demo => "demo",
});

#[cfg(test)]
mod tests {
    use super::*;

    /// The text forms are the schema's CHECK values and the serde spelling.
    #[test]
    fn text_forms_match_serde() {
        for s in [FitStatus::Published, FitStatus::Rejected, FitStatus::Failed] {
            assert_eq!(serde_json::to_value(s).unwrap(), s.as_str());
        }
        for s in [
            RunStatus::Running,
            RunStatus::Succeeded,
            RunStatus::Partial,
            RunStatus::Failed,
            RunStatus::Abandoned,
            RunStatus::Skipped,
        ] {
            assert_eq!(serde_json::to_value(s).unwrap(), s.as_str());
        }
        for t in [
            RunTrigger::Schedule,
            RunTrigger::CatchUp,
            RunTrigger::Manual,
            RunTrigger::Demo,
        ] {
            assert_eq!(serde_json::to_value(t).unwrap(), t.as_str());
        }
    }
}
