#!/usr/bin/env python3
"""Read lineside's Kubernetes manifests (deploy/kubernetes/) and, on request, validate them.

    .venv/bin/python tools/check_deploy.py                    # print the parsed manifests
    .venv/bin/python tools/check_deploy.py --validate 1.37    # and validate them

Prints one JSON object to stdout:

    {"objects": [{"kind": ..., "name": ..., "file": ..., <the parsed object's own keys>}, ...],
     "kustomization": <the parsed kustomization.yaml>}

`objects` holds every YAML document of every *.yaml / *.yml file under the folder except
kustomization.yaml, in file-name order; `file` is the path relative to the folder.

With `--validate VERSION`, each of those files is also checked with kubernetes-validate's
Python API in strict mode (unknown fields are errors) against that Kubernetes version, and the
set is checked for consistency: kustomization.yaml lists exactly the other files, each file
holds one object, and the Deployment's grace period covers its preStop sleep plus the
config's drain_ms plus 5 s. Problems go to stderr, one a line, and the exit code is 1.
Exit 2: a file cannot be read or parsed.

Needs PyYAML and kubernetes-validate (both in the project's venv).
"""

import argparse
import json
import sys
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parent.parent
DEFAULT_DIR = ROOT / "deploy" / "kubernetes"
KUSTOMIZATION = "kustomization.yaml"
GRACE_MARGIN_S = 5


def manifest_files(folder: Path) -> list[Path]:
    files = [p for p in folder.rglob("*") if p.is_file() and p.suffix in (".yaml", ".yml")]
    return sorted(p for p in files if p.name != KUSTOMIZATION)


def load(path: Path) -> list[dict]:
    with open(path, encoding="utf-8") as f:
        docs = [d for d in yaml.safe_load_all(f) if d is not None]
    for d in docs:
        if not isinstance(d, dict):
            raise ValueError(f"{path}: a YAML document that is not a mapping")
    return docs


def entry(obj: dict, rel: str) -> dict:
    out = {
        "kind": obj.get("kind"),
        "name": (obj.get("metadata") or {}).get("name"),
        "file": rel,
    }
    out.update(obj)
    return out


def validate_files(docs_by_file: dict[str, list[dict]], version: str) -> list[str]:
    import kubernetes_validate
    from kubernetes_validate.utils import VersionNotSupportedError, all_versions
    from packaging.version import InvalidVersion, Version

    problems = []
    supported = all_versions()  # e.g. ["1.25.0", ..., "1.37.0"]
    try:
        wanted = Version(version.removeprefix("v"))
    except InvalidVersion:
        return [f"--validate {version}: not a Kubernetes version (e.g. 1.37)"]
    oldest, newest = Version(supported[0]), Version(supported[-1])
    if not (oldest.release[:2] <= wanted.release[:2] <= newest.release[:2]):
        return [
            f"kubernetes-validate {kubernetes_validate.__version__} has schemas for Kubernetes "
            f"{supported[0]} to {supported[-1]}, not {version}"
        ]
    for rel, docs in docs_by_file.items():
        for doc in docs:
            what = f"{rel}: {doc.get('kind')}/{(doc.get('metadata') or {}).get('name')}"
            try:
                kubernetes_validate.validate(doc, version, True)
            except kubernetes_validate.ValidationError as e:
                at = ".".join(str(p) for p in e.path) or "(top)"
                problems.append(f"{what}: invalid against Kubernetes {e.version}: {at}: {e.message}")
            except (kubernetes_validate.SchemaNotFoundError, kubernetes_validate.InvalidSchemaError) as e:
                problems.append(f"{what}: {e.message}")
            except VersionNotSupportedError as e:
                problems.append(f"kubernetes-validate {kubernetes_validate.__version__} has no schemas for Kubernetes {e.version}")
                return problems
            except Exception as e:  # a schema reference the library cannot resolve, and the like
                problems.append(f"{what}: could not be validated: {type(e).__name__}: {e}")
    return problems


def drain_ms(objects: list[dict]) -> int | None:
    """drain_ms from the lineside.toml of a ConfigMap, if there is one (default 10000)."""
    try:
        import tomllib
    except ImportError:  # Python < 3.11
        return None
    for obj in objects:
        if obj.get("kind") == "ConfigMap" and "lineside.toml" in (obj.get("data") or {}):
            config = tomllib.loads(obj["data"]["lineside.toml"])
            return int(config.get("server", {}).get("drain_ms", 10000))
    return None


def consistency(folder: Path, docs_by_file: dict[str, list[dict]], kustomization: dict) -> list[str]:
    problems = []
    listed = set(kustomization.get("resources") or [])
    present = set(docs_by_file)
    for rel in sorted(present - listed):
        problems.append(f"{KUSTOMIZATION}: does not list {rel}")
    for rel in sorted(listed - present):
        problems.append(f"{KUSTOMIZATION}: lists {rel}, which is not a manifest file in {folder}")
    for rel, docs in docs_by_file.items():
        if len(docs) != 1:
            problems.append(f"{rel}: {len(docs)} objects, expected one a file")
    objects = [d for docs in docs_by_file.values() for d in docs]
    drain = drain_ms(objects)
    for obj in objects:
        if obj.get("kind") != "Deployment":
            continue
        pod = obj.get("spec", {}).get("template", {}).get("spec", {})
        grace = pod.get("terminationGracePeriodSeconds", 30)
        for c in pod.get("containers", []):
            sleep = (((c.get("lifecycle") or {}).get("preStop") or {}).get("sleep") or {}).get("seconds", 0)
            if drain is not None and grace < sleep + drain / 1000 + GRACE_MARGIN_S:
                problems.append(
                    f"Deployment/{obj['metadata']['name']}: terminationGracePeriodSeconds {grace} < preStop sleep "
                    f"{sleep} s + drain_ms {drain / 1000:g} s + {GRACE_MARGIN_S} s margin"
                )
    return problems


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--dir", type=Path, default=DEFAULT_DIR, help="manifest folder (default: deploy/kubernetes)")
    ap.add_argument("--validate", metavar="VERSION", help="validate against this Kubernetes version (e.g. 1.37)")
    args = ap.parse_args()

    folder = args.dir
    try:
        docs_by_file = {str(p.relative_to(folder)): load(p) for p in manifest_files(folder)}
        kpath = folder / KUSTOMIZATION
        kustomization = load(kpath)[0] if kpath.exists() else None
    except (OSError, ValueError, yaml.YAMLError) as e:
        print(f"check_deploy: {e}", file=sys.stderr)
        return 2

    objects = [entry(d, rel) for rel, docs in docs_by_file.items() for d in docs]
    json.dump({"objects": objects, "kustomization": kustomization}, sys.stdout, indent=1)
    sys.stdout.write("\n")

    if not args.validate:
        return 0
    problems = validate_files(docs_by_file, args.validate)
    if kustomization is None:
        problems.append(f"{folder / KUSTOMIZATION}: missing")
    else:
        problems += consistency(folder, docs_by_file, kustomization)
    for p in problems:
        print(p, file=sys.stderr)
    if problems:
        return 1
    print(f"check_deploy: {len(objects)} objects valid against Kubernetes {args.validate} (strict)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
