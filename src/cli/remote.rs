//! The commands that talk to a running server: `status`, `models`, `retrain`, `rollback`,
//! `freeze`, `unfreeze`, `approve`, `decline`, `log --server` and `train --reproduce --server`.

use super::*;

pub(super) fn remote(command: Command) -> anyhow::Result<()> {
    let (remote, json) = match &command {
        Command::Status { remote }
        | Command::Models { remote }
        | Command::Retrain { remote, .. }
        | Command::Rollback { remote, .. }
        | Command::Freeze { remote, .. }
        | Command::Unfreeze { remote, .. }
        | Command::Approve { remote, .. }
        | Command::Decline { remote, .. } => (remote, remote.json),
        _ => unreachable!("only remote commands come here"),
    };
    let approving = matches!(command, Command::Approve { .. });
    let client = ApiClient::with_ca_cert(
        &remote.server,
        remote.key.clone(),
        remote.ca_cert.as_deref(),
    )?;
    let print = |value: &Json, text: String| -> anyhow::Result<()> {
        if json {
            emit(&format!("{}\n", serde_json::to_string_pretty(value)?))
        } else {
            emit(&text)
        }
    };
    match command {
        Command::Status { .. } => {
            let models = client.get("/v1/models")?;
            let candidate = client.get("/v1/candidate")?;
            let sign_off = client.get("/v1/sign-off")?;
            let log = client.get("/v1/promotions?limit=1")?;
            // No active model yet means no drift report: that is a state, not a failure.
            let drift = match client.get("/v1/drift") {
                Ok(drift) => drift,
                Err(ClientError::Refused { status: 503, .. }) => Json::Null,
                Err(e) => return Err(e.into()),
            };
            let status = serde_json::json!({
                "models": models, "candidate": candidate, "sign_off": sign_off,
                "last": log["entries"][0], "drift": drift,
            });
            print(&status, status_text(&status))
        }
        Command::Models { .. } => {
            let models = client.get("/v1/models")?;
            print(&models, models_text(&models))
        }
        Command::Retrain {
            no_wait, reason, ..
        } => {
            let run = client.post("/v1/retrain", &with_reason(serde_json::json!({}), reason))?;
            let run_id = run["run_id"].as_str().unwrap_or_default().to_owned();
            if no_wait {
                return print(&run, format!("run {run_id} queued\n"));
            }
            let spinner = ProgressBar::new_spinner();
            spinner.set_message(format!("run {run_id}: queued"));
            spinner.enable_steady_tick(std::time::Duration::from_millis(120));
            let finished = loop {
                std::thread::sleep(std::time::Duration::from_millis(500));
                let status = client.get(&format!("/v1/runs/{run_id}"))?;
                let state = status["run"]["state"].as_str().unwrap_or("?").to_owned();
                spinner.set_message(format!("run {run_id}: {state}"));
                if state == "finished" {
                    break status;
                }
            };
            spinner.finish_and_clear();
            let entry = &finished["entry"];
            print(
                &finished,
                format!(
                    "run {run_id}: {} ({})\n",
                    entry["verdict"].as_str().unwrap_or("?"),
                    entry["reason"].as_str().unwrap_or("")
                ),
            )?;
            if entry["verdict"] == "failed" {
                bail!("run {run_id} failed");
            }
            Ok(())
        }
        Command::Rollback { to, reason, .. } => {
            let body = match to {
                Some(to) => serde_json::json!({ "to": to }),
                None => serde_json::json!({}),
            };
            let reply = client.post("/v1/rollback", &with_reason(body, reason))?;
            let text = format!(
                "{}\n",
                reply["entry"]["reason"].as_str().unwrap_or("rolled back")
            );
            print(&reply, text)
        }
        Command::Freeze { reason, .. } => {
            let reply = client.post("/v1/freeze", &with_reason(serde_json::json!({}), reason))?;
            let text = format!(
                "promotions frozen since {}\n",
                reply["since"].as_str().unwrap_or("?")
            );
            print(&reply, text)
        }
        Command::Unfreeze { reason, .. } => {
            let reply = client.post("/v1/unfreeze", &with_reason(serde_json::json!({}), reason))?;
            print(&reply, "promotions unfrozen\n".to_owned())
        }
        Command::Approve { run_id, reason, .. } | Command::Decline { run_id, reason, .. } => {
            let action = if approving { "approve" } else { "decline" };
            // The run id goes into the path: percent-encode what is not a plain id character.
            let path = format!("/v1/sign-off/{}/{action}", path_segment(&run_id));
            let reply = client.post(&path, &serde_json::json!({ "reason": reason }))?;
            let entry = &reply["entry"];
            let text = format!(
                "{} ({})\n",
                entry["verdict"].as_str().unwrap_or("?"),
                entry["reason"].as_str().unwrap_or("")
            );
            print(&reply, text)
        }
        _ => unreachable!("only remote commands come here"),
    }
}

/// `train --reproduce RUN --server URL`: the server re-fits the run from its store; exits 1
/// when the candidate does not come out bit for bit.
pub(super) fn reproduce_on(client: &ApiClient, run_id: &str, json: bool) -> anyhow::Result<()> {
    let path = format!("/v1/runs/{}/reproduce", path_segment(run_id));
    let reply = client.post(&path, &serde_json::json!({}))?;
    let result: crate::reproduce::Reproduction = serde_json::from_value(reply)?;
    print_reproduction(&result, json)
}

/// `body` with `"reason"` added when one was given.
fn with_reason(mut body: Json, reason: Option<String>) -> Json {
    if let (Some(reason), Some(object)) = (reason, body.as_object_mut()) {
        object.insert("reason".into(), Json::String(reason));
    }
    body
}

/// A path segment: unreserved characters (RFC 3986 §2.3) as they are, every other byte
/// percent-encoded.
fn path_segment(text: &str) -> String {
    text.bytes()
        .map(|b| match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'.' | b'_' | b'~' => {
                (b as char).to_string()
            }
            _ => format!("%{b:02X}"),
        })
        .collect()
}

/// The `status` command's text: one line per part.
pub(super) fn status_text(status: &Json) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let models = &status["models"];
    let active_id = models["active"].as_str();
    let active = models["models"]
        .as_array()
        .and_then(|list| list.iter().find(|m| m["active"] == true));
    match (active_id, active) {
        (Some(id), Some(model)) => {
            let setting = serde_json::from_value::<crate::model::Setting>(model["setting"].clone())
                .map(|s| s.to_string())
                .unwrap_or_default();
            let holdout = model["holdout"]
                .as_object()
                .map(|h| {
                    ["auc", "log_loss", "rmse", "mae"]
                        .iter()
                        .filter_map(|k| {
                            h.get(*k)
                                .and_then(Json::as_f64)
                                .map(|v| format!("{k} {v:.4}"))
                        })
                        .collect::<Vec<_>>()
                        .join(", ")
                })
                .unwrap_or_default();
            let _ = writeln!(
                out,
                "active model  {id}  {setting}  holdout {holdout}  created {}",
                model["created_at"].as_str().unwrap_or("?")
            );
        }
        _ => out.push_str("active model  none yet\n"),
    }
    if models["frozen"] == true {
        let _ = writeln!(
            out,
            "promotions    frozen since {}{}{}",
            models["frozen_since"].as_str().unwrap_or("?"),
            models["frozen_by"]
                .as_str()
                .map(|by| format!(" by {by}"))
                .unwrap_or_default(),
            models["frozen_reason"]
                .as_str()
                .map(|r| format!(": {r}"))
                .unwrap_or_default(),
        );
    } else {
        out.push_str("promotions    not frozen\n");
    }
    let candidate = &status["candidate"];
    match candidate["candidate"]["id"].as_str() {
        Some(id) if candidate["share"].is_object() => {
            let _ = writeln!(
                out,
                "candidate     {id} holds a traffic share since {}",
                candidate["candidate"]["since"].as_str().unwrap_or("?")
            );
        }
        Some(id) => {
            let _ = writeln!(
                out,
                "candidate     {id} shadowing: {} of {} outcomes since {}",
                candidate["outcomes"],
                candidate["needed"],
                candidate["candidate"]["since"].as_str().unwrap_or("?")
            );
        }
        None => out.push_str("candidate     none shadowing\n"),
    }
    let share = &candidate["share"];
    if let Some(fraction) = share["fraction"].as_f64() {
        let arm = |name: &str| {
            let a = &share[name];
            format!(
                "{} of {} outcomes, {} answers, {} failed",
                a["outcomes"], share["needed_per_arm"], a["answers"], a["errors"]
            )
        };
        let _ = writeln!(
            out,
            "share         {:.1}% of requests by {}{}; candidate arm {}; active arm {}",
            100.0 * fraction,
            share["sticky_by"].as_str().unwrap_or("?"),
            if share["stopped"] == true {
                " (stopped by the error guardrail)"
            } else {
                ""
            },
            arm("candidate"),
            arm("active")
        );
    }
    let waiting = &status["sign_off"]["waiting"];
    if let Some(run) = waiting["run_id"].as_str() {
        let _ = writeln!(
            out,
            "sign-off      run {run}'s candidate {} waits since {} (expires {}){}: understudy approve {run} --reason ... | understudy decline {run} --reason ...",
            waiting["candidate_id"].as_str().unwrap_or("?"),
            waiting["since"].as_str().unwrap_or("?"),
            waiting["expires_at"].as_str().unwrap_or("never"),
            waiting["blocked_by"]
                .as_str()
                .map(|b| format!("; cannot be approved now: {b}"))
                .unwrap_or_default(),
        );
    }
    let last = &status["last"];
    if last.is_null() {
        out.push_str("last run      none yet\n");
    } else {
        let _ = writeln!(
            out,
            "last run      {} {} {} → {}: {}",
            last["run_id"].as_str().unwrap_or("?"),
            last["at"].as_str().unwrap_or("?"),
            last["trigger"].as_str().unwrap_or("?"),
            last["verdict"].as_str().unwrap_or("?"),
            last["reason"].as_str().unwrap_or("")
        );
    }
    let drift = &status["drift"]["drift"];
    match drift["features"].as_array() {
        Some(features) => {
            let band = |name: &str| {
                features
                    .iter()
                    .filter(|f| f["band"] == name)
                    .map(|f| {
                        format!(
                            "{} {:.3}",
                            f["name"].as_str().unwrap_or("?"),
                            f["psi"].as_f64().unwrap_or(0.0)
                        )
                    })
                    .collect::<Vec<_>>()
            };
            let (act, watch) = (band("act"), band("watch"));
            let _ = writeln!(
                out,
                "drift         {} requests: act [{}], watch [{}], score {}",
                drift["window"]["rows"],
                act.join(", "),
                watch.join(", "),
                drift["score"]["band"].as_str().unwrap_or("-")
            );
        }
        None => out.push_str("drift         no report (no active model, or it predates drift)\n"),
    }
    out
}

/// The `models` command's text: one line per model, the active one marked.
pub(super) fn models_text(models: &Json) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let list = models["models"].as_array().cloned().unwrap_or_default();
    if list.is_empty() {
        return "(no models yet)\n".to_owned();
    }
    for model in list {
        let setting = serde_json::from_value::<crate::model::Setting>(model["setting"].clone())
            .map(|s| s.to_string())
            .unwrap_or_default();
        let _ = writeln!(
            out,
            "{} {:<20} {:<24} {}",
            if model["active"] == true { "*" } else { " " },
            model["id"].as_str().unwrap_or("?"),
            model["created_at"].as_str().unwrap_or("?"),
            setting
        );
    }
    out
}

#[cfg(test)]
mod tests {
    use serde_json::json;

    #[test]
    fn status_shows_a_traffic_share_and_each_arms_progress() {
        let status = json!({
            "models": {"active": null, "models": []},
            "candidate": {
                "candidate": {"id": "m-2-abc", "since": "2026-12-03T10:00:00Z"},
                "outcomes": 90, "needed": 0,
                "share": {
                    "fraction": 0.2, "sticky_by": "ref", "needed_per_arm": 200, "stopped": false,
                    "candidate": {"outcomes": 17, "answers": 40, "errors": 1},
                    "active": {"outcomes": 73, "answers": 160, "errors": 0}
                }
            },
        });
        let text = super::status_text(&status);
        assert!(
            text.contains("candidate     m-2-abc holds a traffic share since 2026-12-03T10:00:00Z"),
            "{text}"
        );
        assert!(
            text.contains("share         20.0% of requests by ref; candidate arm 17 of 200 outcomes, 40 answers, 1 failed; active arm 73 of 200 outcomes, 160 answers, 0 failed"),
            "{text}"
        );
        let mut stopped = status.clone();
        stopped["candidate"]["share"]["stopped"] = json!(true);
        assert!(super::status_text(&stopped).contains("(stopped by the error guardrail)"));
        // Without a share, no share line.
        let mut plain = status;
        plain["candidate"]["share"] = json!(null);
        let text = super::status_text(&plain);
        assert!(!text.contains("share "), "{text}");
        assert!(
            text.contains("m-2-abc shadowing: 90 of 0 outcomes"),
            "{text}"
        );
    }
}
