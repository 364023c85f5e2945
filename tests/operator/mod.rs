//! What an operator touches: the configuration check, the demo, the HTTP surface, the
//! alert rules and dashboards, the deployment manifests.

mod check_config;
mod demo;
mod deployment;
mod prometheus_rules;
mod surface;
