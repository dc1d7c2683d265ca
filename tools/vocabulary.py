#!/usr/bin/env python3
"""Writes docs/vocabulary.md: every user-facing name of probity, one word per idea.

    python3 tools/vocabulary.py --probity target/debug/probity --metrics scrape.txt > docs/vocabulary.md

Commands and flags come from the binary's own help, RPCs, messages and fields from the proto files (with their
comments), metric families and labels from a scrape of a running server's /metrics (`# HELP` text and the label
names seen), configuration keys and environment variables from the table below (the configuration loader refuses
any key not listed there: keep both in step). service/tests/cli.rs and service/tests/deploy_monitoring.rs check
that the page names everything the binary, the proto files and a running server show.
"""

import argparse
import glob
import os
import re
import subprocess
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

WORDS = [
    ("route", "A name a caller scores against; the configuration maps it to a model (the champion), a target base "
              "rate, a decision rule, input policies and challengers."),
    ("champion", "The model that answers a route's requests."),
    ("challenger", "A model scored beside the champion on the same route, to be compared with it."),
    ("silent", "A challenger mode: the challenger scores every request off the answer path and never answers."),
    ("live", "A challenger mode: the challenger answers a sticky `share` of the route's subjects."),
    ("share", "The part of a route's subjects a live challenger answers, in [0, 1]."),
    ("paired", "For a live challenger: the model that did not answer scores the request silently too, so every "
               "request has both predictions."),
    ("subject", "The card, account or customer a row is about; `subject_key` keeps it with one model and names it "
                "in the prediction store."),
    ("prediction store", "Where every prediction is kept until its outcome arrives, and where reports and "
                         "comparisons come from (`[store]`, `--store`, `probity_store_*`): SQLite on one machine, "
                         "PostgreSQL for a fleet."),
    ("log", "Process logging only (`[logging]`, `--log-level`, `--log-format`)."),
    ("outcome", "The observed label of a prediction, sent later by prediction id."),
    ("record", "When a route's predictions are committed to the prediction store: `after-answer` (the default: the "
               "answer never waits) or `before-answer` (the answer waits for the commit)."),
    ("maturity", "The time after which a prediction without a positive outcome settles as a negative."),
    ("hold", "How long an outcome that arrived before its prediction waits for it."),
    ("target base rate", "The live positive rate a route's probabilities are corrected to."),
    ("promote", "Make a route's challenger its champion (and the champion the challenger), recorded in the route "
                "history."),
    ("restore", "Return a route to its previous champion (the one before its last promotion not yet undone), "
                "recorded in the route history like a promotion."),
    ("NAME@VERSION", "A model pinned to one version, in routes, challengers, requests and commands; a bare NAME means "
                     "the one version of that model loaded (a model named bare is loaded in one version at a time)."),
    ("reasons", "The features that pushed a score most towards the adverse side, for an explanation."),
]

CONFIG = [
    ("server.grpc_listen", "gRPC address (default 127.0.0.1:50051)."),
    ("server.metrics_listen", "HTTP address of /metrics, /livez and /readyz (default 127.0.0.1:9464)."),
    ("server.reflection", "Serve gRPC reflection (default true)."),
    ("server.shutdown_grace_ms", "How long calls may finish after SIGTERM/SIGINT."),
    ("server.max_connection_age_ms", "Longest life of one gRPC connection (0: no limit)."),
    ("server.plaintext", "`loopback`: allow plain text on a loopback address."),
    ("server.tls.certificate_file", "PEM certificate chain."),
    ("server.tls.key_file", "PEM private key."),
    ("server.tls.client_ca_file", "CA of client certificates (mutual TLS)."),
    ("server.tls.client_certificates", "`required` or `optional`."),
    ("access.callers[].name", "A caller's name, logged with refusals."),
    ("access.callers[].token_file", "File holding the caller's bearer token."),
    ("access.callers[].certificate_name", "Subject CN of the caller's client certificate."),
    ("access.callers[].roles", "`score`, `outcome-write`, `report-read`, `admin`."),
    ("models.directory", "Directory of model files."),
    ("models.watch", "Reload on file changes."),
    ("models.watch_debounce_ms", "Quiet time before a changed file is read."),
    ("limits.max_batch_rows", "Most rows in one ScoreBatch call."),
    ("limits.max_message_bytes", "Largest gRPC message."),
    ("limits.max_concurrent_requests", "Calls served at once; more wait within their deadline."),
    ("limits.max_connections", "Connections open at once on the gRPC port; one over it is closed at once."),
    ("limits.max_streams_per_connection", "Calls open at once on one connection (HTTP/2 SETTINGS_MAX_CONCURRENT_STREAMS)."),
    ("limits.default_deadline_ms", "Deadline of a call that sends none."),
    ("logging.format", "`text` or `json`."),
    ("logging.level", "Process log filter (e.g. `info`)."),
    ("store.backend", "`sqlite` (default) or `postgres`."),
    ("store.directory", "SQLite: where predictions.db goes; both: the route history. Off without it (SQLite)."),
    ("store.postgres_url_file", "PostgreSQL: file holding the connection URL."),
    ("store.postgres_ca_file", "PostgreSQL: CA certificates for TLS to the database."),
    ("store.postgres_start_wait", "PostgreSQL: how long a starting server waits for a database that does not answer."),
    ("store.durability", "SQLite: `normal` or `full`."),
    ("store.queue_size", "Predictions waiting for the writer."),
    ("store.batch_size", "Most predictions per transaction."),
    ("store.flush_interval", "Longest a prediction waits in the queue."),
    ("store.outcome_hold", "How long an outcome waits for its prediction."),
    ("store.retention", "Predictions older than this are removed."),
    ("store.sweep_interval", "How often maturity, hold and retention are applied."),
    ("store.psi_window", "Recent predictions per route, model and version in the PSI gauge."),
    ("store.prior_window", "Recent predictions per route in the base-rate estimate."),
    ("store.maturity.<route>", "Maturity period of a route."),
    ("routes.<route>.model", "The champion: NAME, or NAME@VERSION to pin a version (a model name is pinned in every "
                             "reference of the configuration or in none)."),
    ("routes.<route>.target_base_rate", "Live base rate the probabilities are corrected to."),
    ("routes.<route>.decision.threshold", "Decide positive above this probability (at it, negative)."),
    ("routes.<route>.decision.false_positive", "Cost of a false positive (with `false_negative`: the "
                                               "cost-minimising threshold)."),
    ("routes.<route>.decision.false_negative", "Cost of a false negative."),
    ("routes.<route>.decision.edges", "Probability edges of score bands."),
    ("routes.<route>.decision.labels", "Names of the score bands (one more than edges)."),
    ("routes.<route>.missing_features", "`route_as_missing` or `reject`."),
    ("routes.<route>.unknown_categories", "`route_as_unknown` or `reject`."),
    ("routes.<route>.unknown_features", "`ignore` or `reject`."),
    ("routes.<route>.reasons.limit", "Most reasons an explanation lists."),
    ("routes.<route>.reasons.adverse", "`higher` or `lower`: which direction of the log-odds is adverse."),
    ("routes.<route>.record", "`after-answer` (default) or `before-answer`: whether the answer waits until its "
                              "prediction is committed to the prediction store."),
    ("routes.<route>.base_rate_from_estimate.min", "Lowest applied estimate."),
    ("routes.<route>.base_rate_from_estimate.max", "Highest applied estimate."),
    ("routes.<route>.base_rate_from_estimate.min_predictions", "Window size before the estimate applies."),
    ("routes.<route>.challengers[].model", "The challenger: NAME or NAME@VERSION (another version of the "
                                            "champion's own model is written NAME@VERSION on both)."),
    ("routes.<route>.challengers[].mode", "`silent` or `live`."),
    ("routes.<route>.challengers[].share", "A live challenger's share of subjects."),
    ("routes.<route>.challengers[].paired", "A live challenger: the other model scores silently too."),
]

ENV = [
    ("PROBITY_<SECTION>_<KEY>", "Sets `<section>.<key>` for server, models, limits, logging and store "
                                "(e.g. PROBITY_STORE_DIRECTORY)."),
    ("PROBITY_STORE_POSTGRES_URL", "The shared store's connection URL when `store.postgres_url_file` is not set."),
]

RENAMED = [
    ("`[log]`, `log.*`, PROBITY_LOG_*", "`[store]`, `store.*`, PROBITY_STORE_*"),
    ("`--log DIR`", "`--store DIR`"),
    ("`probity_log_*` metrics", "`probity_store_*`"),
    ("`probity_shadow_*` metrics", "`probity_silent_*`"),
    ("challenger `mode = \"mirror\"`", "`mode = \"silent\"`"),
    ("challenger `mode = \"split\"`, `fraction`", "`mode = \"live\"`, `share`"),
    ("challenger `mirror_back`", "`paired`"),
    ("`Row.entity_key`", "`Row.subject_key`"),
    ("`Models.DescribeModel`", "`Models.ModelFacts`"),
]


def run(args):
    return subprocess.run(args, check=True, capture_output=True, text=True).stdout


def cli(probity):
    out = ["## Commands and flags", "",
           "From `probity <command> -h`. Flags shared by several commands mean the same everywhere.", ""]
    top = run([probity, "-h"])
    commands = []
    section = None
    for line in top.splitlines():
        if line.endswith(":") and not line.startswith(" "):
            section = line[:-1]
            continue
        m = re.match(r"^  ([a-z][a-z-]*)\s{2,}(.*)$", line)
        if section == "Commands" and m and m.group(1) != "help":
            commands.append((m.group(1), m.group(2)))
    for name, about in commands:
        out += [f"### `probity {name}`", "", about, "", "| flag | meaning |", "|---|---|"]
        text = run([probity, name, "-h"])
        section = None
        for line in text.splitlines():
            if line.endswith(":") and not line.startswith(" "):
                section = line[:-1]
                continue
            if section != "Options":
                continue
            m = re.match(r"^\s+(?:-\w, )?(--[a-z0-9-]+)(?: <[^>]+>)?(?:\.\.\.)?\s{2,}(.*)$", line)
            if m and m.group(1) not in ("--help", "--version"):
                out.append(f"| `{m.group(1)}` | {m.group(2).replace('|', '/')} |")
            elif m is None:
                m = re.match(r"^\s+(?:-\w, )?(--[a-z0-9-]+)", line)
                if m and m.group(1) not in ("--help", "--version"):
                    out.append(f"| `{m.group(1)}` | |")
        out.append("")
    return out


def proto():
    out = ["## gRPC: services, calls, messages and fields", "",
           "From `proto/probity/v1/*.proto` (package `probity.v1`), with their comments.", ""]
    for path in sorted(glob.glob(os.path.join(ROOT, "proto", "probity", "v1", "*.proto"))):
        lines = open(path, encoding="utf-8").read().splitlines()
        out += [f"### `{os.path.basename(path)}`", "", "| name | kind | meaning |", "|---|---|---|"]
        comment, scope = [], []
        for raw in lines:
            line = raw.strip()
            if line.startswith("//"):
                comment.append(line[2:].strip())
                continue
            text = " ".join(comment).replace("|", "/")
            comment = [] if line else comment
            m = re.match(r"^(service|message|enum)\s+(\w+)\s*\{", line)
            if m:
                scope.append(m.group(2))
                out.append(f"| `{m.group(2)}` | {m.group(1)} | {text} |")
                continue
            m = re.match(r"^rpc\s+(\w+)\(", line)
            if m:
                out.append(f"| `{m.group(1)}` | call of `{scope[-1]}` | {text} |")
                continue
            m = re.match(r"^(?:optional\s+|repeated\s+)?(?:map<[^>]+>|[\w.]+)\s+(\w+)\s*=\s*\d+;", line)
            if m and scope:
                out.append(f"| `{m.group(1)}` | field of `{scope[-1]}` | {text} |")
                continue
            m = re.match(r"^([A-Z][A-Z0-9_]+)\s*=\s*\d+;", line)
            if m and scope:
                out.append(f"| `{m.group(1)}` | value of `{scope[-1]}` | {text} |")
                continue
            m = re.match(r"^oneof\s+(\w+)\s*\{", line)
            if m:
                scope.append(scope[-1] if scope else m.group(1))
                out.append(f"| `{m.group(1)}` | one-of of `{scope[-1]}` | {text} |")
                continue
            if line.startswith("}") and scope:
                scope.pop()
        out.append("")
    return out


def metrics(scrape):
    out = ["## Metrics and labels", "",
           "Prometheus exposition on the monitoring port (`/metrics`), from a running server with the prediction "
           "store, a silent challenger, TLS and a maturity period on; families it had not recorded yet (failure "
           "counters) from the source.", "", "| family | type | meaning |",
           "|---|---|---|"]
    helps, types, labels = {}, {}, {}
    for line in open(scrape, encoding="utf-8"):
        line = line.rstrip("\n")
        if line.startswith("# HELP "):
            name, _, text = line[7:].partition(" ")
            helps[name] = text
        elif line.startswith("# TYPE "):
            name, _, kind = line[7:].partition(" ")
            types[name] = kind
        elif line and not line.startswith("#") and "{" in line:
            name, rest = line.split("{", 1)
            for key in re.findall(r'(\w+)="', rest.rsplit("}", 1)[0]):
                labels.setdefault(key, set()).add(re.sub(r"_(bucket|sum|count)$", "", name))
    # Families a quiet server has not recorded yet (counters of failures, say) are in the source: a constant with
    # its doc comment, and the `describe_*!` call that names its type.
    source = "\n".join(open(f, encoding="utf-8").read()
                       for f in glob.glob(os.path.join(ROOT, "service", "src", "**", "*.rs"), recursive=True))
    for m in re.finditer(r'((?:[ \t]*///[^\n]*\n)+)\s*pub const (\w+): &str = "(probity_\w+)";', source):
        doc, const, name = m.groups()
        if name in types:
            continue
        described = re.search(r"describe_(counter|gauge|histogram)!\(\s*" + const +
                              r'\s*,\s*(?:metrics::Unit::\w+,\s*)?"([^"]*)"', source)
        if described:
            types[name], helps[name] = described.groups()
        else:
            types[name] = "counter" if name.endswith("_total") else "gauge"
            helps[name] = " ".join(l.strip()[3:].strip() for l in doc.strip().splitlines())
    for name in sorted(types):
        out.append(f"| `{name}` | {types[name]} | {helps.get(name, '').replace('|', '/')} |")
    out += ["", "| label | on |", "|---|---|"]
    for key in sorted(labels):
        fams = sorted(f for f in labels[key])
        shown = ", ".join(f"`{f}`" for f in fams[:4]) + (f" and {len(fams) - 4} more" if len(fams) > 4 else "")
        out.append(f"| `{key}` | {shown} |")
    out.append("")
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--probity", required=True, help="the probity binary")
    ap.add_argument("--metrics", required=True, help="a scrape of a running server's /metrics")
    a = ap.parse_args()
    out = ["# Vocabulary", "",
           "Every name a user of probity meets: commands and flags, configuration keys and environment variables, "
           "gRPC calls, messages and fields, metrics and labels. One word per idea across all of them. Terms of the "
           "trade and of open standards keep their usual meaning (log-odds, Brier score, PSI, champion, challenger, "
           "gRPC health checking, Prometheus naming). Written by `tools/vocabulary.py`; the tests check that it "
           "names everything the binary, the proto files and a running server show.", "",
           "## Words", "", "| word | meaning |", "|---|---|"]
    out += [f"| {w} | {m} |" for w, m in WORDS]
    out += ["", "## Renamed", "",
            "Names of earlier releases are refused with the new name in the message (no silent aliases).", "",
            "| earlier | now |", "|---|---|"]
    out += [f"| {a_} | {b} |" for a_, b in RENAMED]
    out += [""] + cli(a.probity)
    out += ["## Configuration keys", "",
            "TOML (`probity serve --config FILE`), then environment variables, then `--set KEY=VALUE`. "
            "`deploy/probity.toml` is a complete example.", "", "| key | meaning |", "|---|---|"]
    out += [f"| `{k}` | {m} |" for k, m in CONFIG]
    out += ["", "| variable | meaning |", "|---|---|"]
    out += [f"| `{k}` | {m} |" for k, m in ENV]
    out += [""] + proto() + metrics(a.metrics)
    sys.stdout.write("\n".join(out))


if __name__ == "__main__":
    main()
