//! What an operator touches: the configuration check, the demo, the HTTP surface, the
//! alert rules and dashboards, the deployment manifests, the evaluation report in a
//! browser.

mod check_config;
mod demo;
mod deployment;
mod prometheus_rules;
mod report_in_browser;
mod surface;
