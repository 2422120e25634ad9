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
}
