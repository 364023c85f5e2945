//! The deployment files: docker-compose.yml (checked by `docker-compose config`, installed
//! by scripts/setup.sh) and deploy/kubernetes/simtide.yaml (checked against the Kubernetes
//! API's JSON schemas by kubernetes-validate from PyPI, also installed by the setup, then
//! parsed for its wiring). Nothing runs in containers here.

use crate::common;

use std::path::Path;
use std::process::Command;

use serde_json::Value;

fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

#[test]
fn compose_file_is_valid_and_runs_two_shards_beside_the_broker_and_prometheus() {
    let out = Command::new("docker-compose")
        .args(["-f", "docker-compose.yml", "config"])
        .current_dir(root())
        .output()
        .expect("docker-compose is installed by scripts/setup.sh");
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    for service in ["broker:", "simtide-0:", "simtide-1:", "prometheus:", "grafana:"] {
        assert!(
            text.contains(&format!("\n  {service}\n")),
            "service {service} missing:\n{text}"
        );
    }
    // Each shard service names its shard of two and has a store volume of its own.
    for shard in ["0", "1"] {
        let block: String = text
            .split(&format!("\n  simtide-{shard}:\n"))
            .nth(1)
            .unwrap()
            .lines()
            .take_while(|l| l.is_empty() || l.starts_with("    "))
            .collect::<Vec<_>>()
            .join("\n");
        assert!(
            block.contains(&format!("SIMTIDE_CLUSTER__SHARD: '{shard}'")),
            "{block}"
        );
        assert!(block.contains("SIMTIDE_CLUSTER__SHARDS: '2'"), "{block}");
        assert!(
            block.contains(&format!("simtide-{shard}-store:/var/lib/simtide")),
            "{block}"
        );
    }
    let prometheus = std::fs::read_to_string(root().join("dashboards/prometheus.yml")).unwrap();
    assert!(
        prometheus.contains(r#"["simtide-0:7461", "simtide-1:7461"]"#),
        "{prometheus}"
    );
    // Every file the services mount exists in the repository.
    let compose = std::fs::read_to_string(root().join("docker-compose.yml")).unwrap();
    for mount in compose.lines().filter_map(|l| l.trim().strip_prefix("- ./")) {
        let file = mount.split(':').next().unwrap();
        assert!(root().join(file).exists(), "{file} is mounted but missing");
    }
    assert!(root().join("Dockerfile").exists());
}

const MANIFEST: &str = "deploy/kubernetes/simtide.yaml";

/// The manifest's documents, parsed by PyYAML.
fn manifest() -> Vec<Value> {
    let text = common::python_json(
        "scripts/manifest_as_json.py",
        &[root().join(MANIFEST).to_str().unwrap()],
    );
    serde_json::from_str(&text).expect("the manifest as JSON")
}

#[test]
fn kubernetes_manifest_passes_the_api_schemas() {
    let validator = common::cache_dir().join("venv/bin/kubernetes-validate");
    let out = Command::new(&validator)
        .args(["--strict", "--kubernetes-version", "1.37.0", MANIFEST])
        .current_dir(root())
        .output()
        .unwrap_or_else(|e| panic!("{} runs (scripts/setup.sh installs it): {e}", validator.display()));
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(out.status.success(), "{text}");
    assert_eq!(text.matches(" passed for resource ").count(), 6, "{text}");
}

#[test]
fn kubernetes_statefulsets_run_every_shard_with_a_store_claim_readiness_and_a_standby() {
    let documents = manifest();
    let config_map = documents
        .iter()
        .find(|d| d["kind"] == "ConfigMap")
        .expect("a ConfigMap");
    let toml_text = config_map["data"]["simtide.toml"].as_str().unwrap();
    // The configuration is valid for every pod: shard from the pod's ordinal, which
    // check-config cannot see here, so it is given as the environment would.
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("simtide.toml");
    std::fs::write(&file, toml_text).unwrap();
    // The admin token file is the mounted Secret's, which only exists in the pod.
    let token = dir.path().join("admin-token");
    std::fs::write(&token, "a-token\n").unwrap();
    let checked = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["check-config", file.to_str().unwrap()])
        .env("SIMTIDE_CLUSTER__SHARD", "2")
        .env("SIMTIDE_HTTP__ADMIN_TOKEN_FILE", &token)
        .output()
        .unwrap();
    assert!(
        checked.status.success(),
        "{}",
        String::from_utf8_lossy(&checked.stderr)
    );
    let config: toml::Value = toml::from_str(toml_text).unwrap();
    let shards = config["cluster"]["shards"].as_integer().unwrap();
    assert!(
        config["cluster"].get("shard").is_none(),
        "the shard comes from the pod ordinal"
    );
    assert!(!config["cluster"]["lease_topic"].as_str().unwrap().is_empty());
    let store_dir = config["store"]["dir"].as_str().unwrap();
    let port: u64 = config["http"]["listen"]
        .as_str()
        .unwrap()
        .rsplit_once(':')
        .unwrap()
        .1
        .parse()
        .unwrap();

    let sets: Vec<&Value> = documents.iter().filter(|d| d["kind"] == "StatefulSet").collect();
    assert_eq!(sets.len(), 2, "the shards and their standbys");
    for set in sets {
        let name = set["metadata"]["name"].as_str().unwrap();
        assert_eq!(
            set["spec"]["replicas"].as_i64(),
            Some(shards),
            "{name}: one pod per shard"
        );
        let pod = &set["spec"]["template"]["spec"];
        let container = &pod["containers"][0];
        assert_eq!(container["args"][0], "run", "{name}");
        assert_eq!(
            container["ports"][0]["containerPort"].as_u64(),
            Some(port),
            "{name}"
        );
        assert_eq!(
            container["readinessProbe"]["httpGet"]["path"], "/readyz",
            "{name}"
        );
        assert_eq!(
            container["livenessProbe"]["httpGet"]["path"], "/healthz",
            "{name}"
        );
        let claim = &set["spec"]["volumeClaimTemplates"][0];
        let claim_name = claim["metadata"]["name"].as_str().unwrap();
        assert!(
            container["volumeMounts"]
                .as_array()
                .unwrap()
                .iter()
                .any(|m| m["name"] == claim_name && m["mountPath"] == store_dir),
            "{name}: the claim {claim_name} is mounted at store.dir {store_dir}"
        );
        // Pod names end in the ordinal the shard is read from.
        assert_eq!(
            simtide::cluster::host_ordinal(&format!("{name}-{}", shards - 1)),
            Some(shards as u32 - 1)
        );
    }
}

#[test]
fn kubernetes_pods_are_hardened_and_a_shard_never_shares_a_node_with_its_standby() {
    let documents = manifest();
    let config_map = documents.iter().find(|d| d["kind"] == "ConfigMap").unwrap();
    let config: toml::Value = toml::from_str(config_map["data"]["simtide.toml"].as_str().unwrap()).unwrap();
    let token_file = config["http"]["admin_token_file"]
        .as_str()
        .expect("the token comes from a file");
    assert!(
        config["http"].get("admin_token").is_none(),
        "no token in the ConfigMap"
    );
    let cargo = std::fs::read_to_string(root().join("Cargo.toml")).unwrap();
    let version = cargo
        .lines()
        .find_map(|l| l.strip_prefix("version = \""))
        .and_then(|v| v.strip_suffix('"'))
        .unwrap();

    let sets: Vec<&Value> = documents.iter().filter(|d| d["kind"] == "StatefulSet").collect();
    for set in &sets {
        let name = set["metadata"]["name"].as_str().unwrap();
        let pod = &set["spec"]["template"]["spec"];
        assert_eq!(pod["securityContext"]["runAsNonRoot"], true, "{name}");
        assert_eq!(
            pod["securityContext"]["seccompProfile"]["type"], "RuntimeDefault",
            "{name}"
        );
        let container = &pod["containers"][0];
        assert_eq!(
            container["image"],
            format!("simtide:{version}").as_str(),
            "{name}: a versioned tag"
        );
        let security = &container["securityContext"];
        assert_eq!(security["allowPrivilegeEscalation"], false, "{name}");
        assert_eq!(security["readOnlyRootFilesystem"], true, "{name}");
        assert_eq!(
            security["capabilities"]["drop"],
            serde_json::json!(["ALL"]),
            "{name}"
        );
        for bound in ["requests", "limits"] {
            for resource in ["cpu", "memory"] {
                assert!(
                    container["resources"][bound][resource].is_string(),
                    "{name}: {bound}.{resource}"
                );
            }
        }
        // Writable: the store claim and an emptyDir at /tmp (the lookup view's scratch).
        let mounts = container["volumeMounts"].as_array().unwrap();
        let volumes = pod["volumes"].as_array().unwrap();
        let volume_of = |path: &str| {
            let mount = mounts
                .iter()
                .find(|m| m["mountPath"] == path)
                .unwrap_or_else(|| panic!("{name}: {path}"));
            volumes.iter().find(|v| v["name"] == mount["name"]).cloned()
        };
        assert!(
            volume_of("/tmp").is_some_and(|v| v.get("emptyDir").is_some()),
            "{name}"
        );
        let token_dir = Path::new(token_file).parent().unwrap().to_str().unwrap();
        let secret = volume_of(token_dir).unwrap_or_else(|| panic!("{name}: the token's Secret"));
        assert_eq!(secret["secret"]["secretName"], "simtide-admin", "{name}");
        // Required anti-affinity on the pod index: simtide-2 and simtide-standby-2 apart.
        let term = &pod["affinity"]["podAntiAffinity"]["requiredDuringSchedulingIgnoredDuringExecution"][0];
        assert_eq!(term["topologyKey"], "kubernetes.io/hostname", "{name}");
        assert_eq!(
            term["matchLabelKeys"],
            serde_json::json!(["apps.kubernetes.io/pod-index"]),
            "{name}"
        );
        assert_eq!(
            term["labelSelector"]["matchLabels"]["app.kubernetes.io/name"], "simtide",
            "{name}"
        );
        // A disruption budget selects exactly this StatefulSet's pods.
        let labels = &set["spec"]["template"]["metadata"]["labels"];
        let budget = documents
            .iter()
            .filter(|d| d["kind"] == "PodDisruptionBudget")
            .find(|d| &d["spec"]["selector"]["matchLabels"] == labels)
            .unwrap_or_else(|| panic!("{name}: no disruption budget selects its pods"));
        assert_eq!(budget["spec"]["maxUnavailable"], 1, "{name}");
    }
    let ignored = std::fs::read_to_string(root().join(".dockerignore")).expect("a .dockerignore");
    for entry in ["target", ".git"] {
        assert!(
            ignored.lines().any(|l| l.trim_start_matches('/') == entry),
            "{entry} is not sent to the build"
        );
    }
}
