//! What the publishing lease switches in the live service (docs/design.md, "Standby
//! replicas"): a standby's producer is muted, so its cycles store lists without delivering
//! them and it produces no dead letters; gaining the lease unmutes it and asks for every
//! stored list to be delivered again, since the output topics hold the previous holder's
//! lists, which may lag this store's.

use std::sync::atomic::Ordering;
use std::sync::Arc;

use crate::kafka::lease::LeaseHolder;
use crate::kafka::producer::RecordProducer;
use crate::observability::metrics::Metrics;
use crate::observability::observe::Observation;
use crate::service::health::Health;
use crate::service::http::AdminRequests;

/// The live service's side of the lease.
pub struct PublishingRole {
    /// Muted while standing by.
    pub producer: Arc<RecordProducer>,
    /// Where the republication request goes.
    pub admin: Arc<AdminRequests>,
    /// Readiness's "publishing" flag.
    pub health: Arc<Health>,
    /// The `publishing` gauge.
    pub metrics: Arc<Metrics>,
}

impl PublishingRole {
    /// Stands by: nothing is produced from now on. Called before the lease is joined.
    pub fn stand_by(&self) {
        self.producer.set_muted(true);
        self.health.set_publishing(false);
        Observation::PublishingRole { publishing: false }.emit(&self.metrics);
    }
}

impl LeaseHolder for PublishingRole {
    fn gained(&self) {
        self.producer.set_muted(false);
        self.health.set_publishing(true);
        Observation::PublishingRole { publishing: true }.emit(&self.metrics);
        self.admin.republish.store(true, Ordering::Relaxed);
    }

    fn lost(&self) {
        self.stand_by();
    }
}
