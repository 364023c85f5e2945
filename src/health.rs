//! Liveness and readiness of the service: the facts `/readyz` reports, each check with the
//! reason it fails, so the on-call engineer reads why, not only that.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use serde::Serialize;

use crate::kafka::client::BrokerState;

/// Shared health facts, updated by the service loop and the broker probe.
#[derive(Debug)]
pub struct Health {
    brokers: Arc<BrokerState>,
    store_error: Mutex<Option<String>>,
    consuming: AtomicBool,
    stopping: AtomicBool,
}

/// One readiness check.
#[derive(Debug, Clone, Serialize, PartialEq, Eq)]
pub struct Check {
    /// What is checked.
    pub name: &'static str,
    /// Whether it passes.
    pub ok: bool,
    /// Why it fails (empty when it passes).
    pub detail: String,
}

/// The `/readyz` answer.
#[derive(Debug, Clone, Serialize, PartialEq, Eq)]
pub struct Readiness {
    /// All checks pass.
    pub ready: bool,
    /// Each check.
    pub checks: Vec<Check>,
}

impl Health {
    /// Health tied to the shared broker state.
    pub fn new(brokers: Arc<BrokerState>) -> Health {
        Health {
            brokers,
            store_error: Mutex::new(None),
            consuming: AtomicBool::new(false),
            stopping: AtomicBool::new(false),
        }
    }

    /// Records a failed store write (`Some`) or a good one (`None`).
    pub fn set_store_error(&self, error: Option<String>) {
        *self.store_error.lock().expect("health lock") = error;
    }

    /// Records that the consumer holds an assignment and is fetching.
    pub fn set_consuming(&self, consuming: bool) {
        self.consuming.store(consuming, Ordering::Relaxed);
    }

    /// Records that shutdown began.
    pub fn set_stopping(&self) {
        self.stopping.store(true, Ordering::Relaxed);
    }

    /// The current checks.
    pub fn readiness(&self) -> Readiness {
        let store_error = self.store_error.lock().expect("health lock").clone();
        let check = |name, ok: bool, detail: &str| Check {
            name,
            ok,
            detail: if ok { String::new() } else { detail.to_string() },
        };
        let checks = vec![
            Check {
                name: "store",
                ok: store_error.is_none(),
                detail: store_error.unwrap_or_default(),
            },
            check(
                "broker",
                self.brokers.reachable(),
                "no broker answered recently; librdkafka keeps retrying",
            ),
            check(
                "consuming",
                self.consuming.load(Ordering::Relaxed),
                "no partitions of the input topic are assigned yet",
            ),
            check("running", !self.stopping.load(Ordering::Relaxed), "shutting down"),
        ];
        Readiness {
            ready: checks.iter().all(|c| c.ok),
            checks,
        }
    }
}
