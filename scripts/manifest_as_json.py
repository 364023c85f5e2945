"""Prints the documents of a YAML file (a Kubernetes manifest) as one JSON list, so that
tests/operator/deployment.rs can check the manifest's wiring with serde_json."""

import json
import sys

import yaml

with open(sys.argv[1], encoding="utf-8") as f:
    documents = [d for d in yaml.safe_load_all(f) if d is not None]
print(json.dumps(documents))
