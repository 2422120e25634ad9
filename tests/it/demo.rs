//! `understudy demo` end to end: kept before the change, promoted after it.

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_demo_keeps_the_incumbent_until_the_world_changes_then_promotes() {
    let dir = tempfile::tempdir().unwrap();
    let summary = understudy::demo::run_in(dir.path().to_owned(), 7, false)
        .await
        .unwrap();
    assert!(
        summary.verdicts_before_change.iter().all(|v| v == "kept"),
        "{summary:?}"
    );
    assert!(
        summary
            .verdicts_after_change
            .iter()
            .any(|v| v == "promoted"),
        "{summary:?}"
    );
    // History's run, then one per month.
    assert_eq!(summary.log.len(), 7);
    assert_eq!(
        summary.log.last().unwrap().verdict,
        understudy::promotion::Verdict::Promoted
    );
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
