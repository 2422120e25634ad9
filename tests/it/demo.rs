//! `understudy demo` end to end: after the change, a promotion learnt from the new rows alone.

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn after_the_world_changes_the_demo_promotes_a_model_learnt_on_a_shorter_window() {
    let dir = tempfile::tempdir().unwrap();
    let summary = understudy::demo::run_in(dir.path().to_owned(), 7, false)
        .await
        .unwrap();
    // After the change a promotion comes from a run whose window search chose a share of
    // the window shorter than the whole: the new rows alone. (Before the change, seed 7
    // promotes once, in month one: the backfill's first model had been chosen on a 720-row
    // validation slice whose standard error of 0.027 let the one-SE rule pick a strongly
    // restrained setting, and month one's fit beat it by 0.024 AUC at p = 1.6e-6.)
    assert!(
        summary
            .verdicts_after_change
            .iter()
            .any(|v| v == "promoted"),
        "{summary:?}"
    );
    let months_after = &summary.log[..3];
    assert!(
        months_after.iter().any(|e| {
            e.verdict == understudy::promotion::Verdict::Promoted
                && e.windows.iter().any(|w| w.chosen && w.share < 1.0)
        }),
        "{months_after:?}"
    );
    // History's run, then one per month.
    assert_eq!(summary.log.len(), 7);
    assert_eq!(
        summary.log.last().unwrap().verdict,
        understudy::promotion::Verdict::Promoted
    );

    // Every run that fitted a candidate re-runs from the store bit for bit.
    // The demo searches the training window (its config is kept beside the store).
    let config = understudy::config::Config::from_toml(&understudy::demo::config_toml()).unwrap();
    assert_eq!(config.training.window_shares, [1.0, 0.5, 0.25]);
    assert!(dir.path().join(understudy::demo::CONFIG_FILE).exists());
    let trained: Vec<String> = summary
        .log
        .iter()
        .filter(|e| e.candidate_id.is_some())
        .map(|e| e.run_id.clone())
        .collect();
    assert!(trained.len() >= 6, "{trained:?}");
    {
        let store = crate::helpers::open_store(dir.path());
        for run in &trained {
            let result = understudy::reproduce::reproduce(&store, &config, run).unwrap();
            assert!(result.reproduced, "{}", result.describe());
            assert!(result.same_rows && result.same_config && result.same_binary);
        }
        // A changed config is detected, and the refit differs.
        let changed = understudy::config::Config::from_toml(
            &understudy::demo::config_toml().replace("folds = 5", "folds = 4"),
        )
        .unwrap();
        let last = trained.last().unwrap();
        let result = understudy::reproduce::reproduce(&store, &changed, last).unwrap();
        assert!(!result.same_config && !result.reproduced, "{result:?}");
        assert!(
            result.describe().contains("config differs"),
            "{}",
            result.describe()
        );
    }
    // The command line says the same and exits 0; an unknown run exits non-zero.
    std::thread::sleep(std::time::Duration::from_millis(300));
    let cli = |run: &str| {
        std::process::Command::new(env!("CARGO_BIN_EXE_understudy"))
            .args(["train", "--reproduce", run, "--data-dir"])
            .arg(dir.path())
            .arg("--config")
            .arg(dir.path().join(understudy::demo::CONFIG_FILE))
            .env_remove("UNDERSTUDY_CONFIG")
            .output()
            .unwrap()
    };
    let out = cli(&trained[0]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text} {}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(text.contains("reproduced bit for bit"), "{text}");
    assert!(!cli("r-999").status.success());
    // The backtest of the same history: six months scored by the three policies, and the
    // replayed runs (the backfill's and months 1-5) reach the service's verdicts.
    let backtest = summary.backtest.as_ref().expect("the demo's backtest");
    assert_eq!(backtest.periods.len(), 6);
    let pairs = understudy::demo::replayed_verdicts(backtest, &summary.log);
    assert_eq!(pairs.len(), 6, "{pairs:?}");
    assert!(
        pairs.iter().all(|(service, replay)| service == replay),
        "{pairs:?}"
    );
}
