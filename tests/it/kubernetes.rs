//! `deploy/kubernetes/`: every manifest parses, and together they say what the README
//! promises: two replicas on PostgreSQL, probes on `/healthz` and `/readyz`, resource
//! requests and limits, a numeric non-root user, a read-only root filesystem with a writable
//! `/tmp`, a Service and a PodDisruptionBudget that select the pods, the config from the
//! ConfigMap (loaded here by the service's own loader) and its secrets from the Secret.
//!
//! The field names are Kubernetes' own (API reference, apps/v1 Deployment, v1 Service,
//! policy/v1 PodDisruptionBudget, v1 ConfigMap and Secret; checked from memory of the
//! published reference, no validator is run here: no kubectl on this machine).

use std::collections::BTreeMap;
use std::path::Path;

use understudy::config::{Config, StoreBackend};
use yaml_rust2::{Yaml, YamlLoader};

/// Every document of every manifest, by kind.
fn manifests() -> BTreeMap<String, Yaml> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy/kubernetes");
    let mut by_kind = BTreeMap::new();
    for entry in std::fs::read_dir(&dir).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().and_then(|e| e.to_str()) != Some("yaml") {
            continue;
        }
        let text = std::fs::read_to_string(&path).unwrap();
        let docs = YamlLoader::load_from_str(&text)
            .unwrap_or_else(|e| panic!("{} does not parse: {e}", path.display()));
        for doc in docs {
            let kind = doc["kind"]
                .as_str()
                .unwrap_or_else(|| panic!("{}: a document without a kind", path.display()))
                .to_owned();
            assert!(
                doc["apiVersion"].as_str().is_some(),
                "{kind} has an apiVersion"
            );
            assert!(
                doc["metadata"]["name"].as_str().is_some(),
                "{kind} has a name"
            );
            assert!(
                by_kind.insert(kind.clone(), doc).is_none(),
                "one {kind} only"
            );
        }
    }
    by_kind
}

fn str_of<'a>(y: &'a Yaml, what: &str) -> &'a str {
    y.as_str().unwrap_or_else(|| panic!("{what} is a string"))
}

fn labels(y: &Yaml) -> BTreeMap<String, String> {
    y.as_hash()
        .expect("labels are a map")
        .iter()
        .map(|(k, v)| {
            (
                str_of(k, "a label").to_owned(),
                str_of(v, "a label").to_owned(),
            )
        })
        .collect()
}

/// Whether every `selector` label is among the pod's `labels`.
fn selects(selector: &Yaml, pod_labels: &BTreeMap<String, String>) -> bool {
    let wanted = labels(selector);
    !wanted.is_empty() && wanted.iter().all(|(k, v)| pod_labels.get(k) == Some(v))
}

#[test]
fn the_manifests_run_two_locked_down_replicas_on_postgres_with_the_config_and_secrets_they_name() {
    let m = manifests();
    for kind in [
        "Deployment",
        "Service",
        "PodDisruptionBudget",
        "ConfigMap",
        "Secret",
    ] {
        assert!(m.contains_key(kind), "a {kind}");
    }
    let deployment = &m["Deployment"];
    assert_eq!(deployment["apiVersion"].as_str(), Some("apps/v1"));
    let spec = &deployment["spec"];
    assert_eq!(spec["replicas"].as_i64(), Some(2));
    let pod = &spec["template"];
    let pod_labels = labels(&pod["metadata"]["labels"]);
    assert!(selects(&spec["selector"]["matchLabels"], &pod_labels));
    // A rollout never takes a replica away before its successor is ready.
    assert_eq!(
        spec["strategy"]["rollingUpdate"]["maxUnavailable"].as_i64(),
        Some(0)
    );

    let pod_spec = &pod["spec"];
    let pod_security = &pod_spec["securityContext"];
    let containers = pod_spec["containers"].as_vec().expect("containers");
    assert_eq!(containers.len(), 1);
    let c = &containers[0];

    // Probes on the service's own endpoints, through the named port.
    let ports = c["ports"].as_vec().expect("ports");
    let http = ports
        .iter()
        .find(|p| p["name"].as_str() == Some("http"))
        .expect("a port named http");
    let container_port = http["containerPort"].as_i64().expect("a port number");
    for (probe, path) in [("livenessProbe", "/healthz"), ("readinessProbe", "/readyz")] {
        let get = &c[probe]["httpGet"];
        assert_eq!(get["path"].as_str(), Some(path), "{probe}");
        assert!(
            get["port"].as_str() == Some("http") || get["port"].as_i64() == Some(container_port),
            "{probe} on the http port"
        );
    }

    // Requests and limits for both CPU and memory.
    for side in ["requests", "limits"] {
        for resource in ["cpu", "memory"] {
            let value = &c["resources"][side][resource];
            assert!(
                value.as_str().is_some() || value.as_i64().is_some(),
                "resources.{side}.{resource}"
            );
        }
    }

    // A numeric non-root user (pod and container agree), no way up, a read-only root.
    let security = &c["securityContext"];
    for context in [pod_security, security] {
        assert_eq!(context["runAsNonRoot"].as_bool(), Some(true));
        let uid = context["runAsUser"].as_i64().expect("a numeric user");
        assert!(uid > 0, "not root");
    }
    assert_eq!(security["readOnlyRootFilesystem"].as_bool(), Some(true));
    assert_eq!(security["allowPrivilegeEscalation"].as_bool(), Some(false));
    assert_eq!(
        security["capabilities"]["drop"][0].as_str(),
        Some("ALL"),
        "every capability dropped"
    );

    // Volumes: /tmp writable (an emptyDir), the config from the ConfigMap, read-only.
    let volumes: BTreeMap<&str, &Yaml> = pod_spec["volumes"]
        .as_vec()
        .expect("volumes")
        .iter()
        .map(|v| (str_of(&v["name"], "a volume name"), v))
        .collect();
    let mounts: BTreeMap<&str, &Yaml> = c["volumeMounts"]
        .as_vec()
        .expect("volume mounts")
        .iter()
        .map(|v| (str_of(&v["mountPath"], "a mount path"), v))
        .collect();
    let tmp = mounts.get("/tmp").expect("/tmp is mounted");
    assert!(!volumes[str_of(&tmp["name"], "a mount's volume")]["emptyDir"].is_badvalue());
    let args: Vec<&str> = c["args"]
        .as_vec()
        .expect("args")
        .iter()
        .map(|a| str_of(a, "an argument"))
        .collect();
    assert_eq!(args.first(), Some(&"serve"));
    let config_path = args[args
        .iter()
        .position(|a| *a == "--config")
        .expect("--config")
        + 1];
    let (config_dir, config_file) = config_path.rsplit_once('/').unwrap();
    let config_mount = mounts.get(config_dir).expect("the config's dir is mounted");
    assert_eq!(config_mount["readOnly"].as_bool(), Some(true));
    let config_map = &m["ConfigMap"];
    assert_eq!(
        volumes[str_of(&config_mount["name"], "a mount's volume")]["configMap"]["name"].as_str(),
        config_map["metadata"]["name"].as_str()
    );

    // The config loads with the service's own loader, on PostgreSQL through a variable.
    let toml = str_of(&config_map["data"][config_file], "the config file");
    let config = Config::from_toml(toml).expect("the ConfigMap's config loads");
    assert_eq!(config.store.backend, StoreBackend::Postgres);
    assert_eq!(config.store.url, None, "no URL in the ConfigMap");
    let url_env = config.store.url_env.clone().expect("url_env");
    assert_eq!(i64::from(config.server.listen.port()), container_port);
    assert!(
        !config.server.listen.ip().is_loopback(),
        "reachable from the Service"
    );
    assert!(
        config.access.open_health,
        "the kubelet's probes carry no key"
    );
    assert!(!config.access.keys.is_empty());
    assert!(
        config.server.data_dir.starts_with("/tmp"),
        "anything written goes to the emptyDir"
    );

    // Every variable the config names comes from the Secret, which holds only placeholders.
    let secret = &m["Secret"];
    let secret_name = secret["metadata"]["name"].as_str();
    let from_secret = c["envFrom"]
        .as_vec()
        .expect("envFrom")
        .iter()
        .any(|e| e["secretRef"]["name"].as_str() == secret_name);
    assert!(
        from_secret,
        "the container takes its variables from the Secret"
    );
    let secret_data = secret["stringData"].as_hash().expect("stringData");
    let secret_value = |var: &str| -> &str {
        secret_data
            .get(&Yaml::String(var.to_owned()))
            .and_then(Yaml::as_str)
            .unwrap_or_else(|| panic!("the Secret holds {var}"))
    };
    let mut wanted = vec![url_env];
    wanted.extend(config.access.keys.iter().filter_map(|k| k.key_env.clone()));
    assert_eq!(
        wanted.len(),
        1 + config.access.keys.len(),
        "every key from a variable"
    );
    for var in &wanted {
        assert!(
            secret_value(var).contains("CHANGE-ME"),
            "{var} is a marked placeholder"
        );
    }
    assert_eq!(
        secret_data.len(),
        wanted.len(),
        "nothing else in the Secret"
    );

    // The Service and the budget select the pods; the budget leaves one replica up.
    let service = &m["Service"];
    assert!(selects(&service["spec"]["selector"], &pod_labels));
    let target = &service["spec"]["ports"][0]["targetPort"];
    assert!(target.as_str() == Some("http") || target.as_i64() == Some(container_port));
    let budget = &m["PodDisruptionBudget"];
    assert_eq!(budget["apiVersion"].as_str(), Some("policy/v1"));
    assert!(selects(
        &budget["spec"]["selector"]["matchLabels"],
        &pod_labels
    ));
    let min_available = budget["spec"]["minAvailable"]
        .as_i64()
        .expect("minAvailable");
    assert!((1..2).contains(&min_available));
}
