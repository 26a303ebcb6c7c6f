//! Every benchmark under tests/benches, run once at a small size, so that a change cannot break
//! one unseen (`cargo bench` runs them at full size). Each prints its figures as it would; what
//! is checked here is that it completes.

#[allow(dead_code)]
#[path = "benches/archive.rs"]
mod archive;
#[allow(dead_code)]
#[path = "benches/bench_time.rs"]
mod bench_time;
#[allow(dead_code)]
#[path = "benches/plan_check.rs"]
mod plan_check;
#[allow(dead_code)]
#[path = "benches/reports.rs"]
mod reports;
#[allow(dead_code)]
#[path = "benches/serial_link.rs"]
mod serial_link;
#[allow(dead_code)]
#[path = "benches/station_screen.rs"]
mod station_screen;

#[test]
fn the_archive_benchmark_runs() {
    archive::run(300);
}

#[test]
fn the_bench_time_benchmark_runs() {
    bench_time::run(2, true);
}

#[test]
fn the_plan_check_benchmark_runs() {
    plan_check::run(500);
}

#[test]
fn the_reports_benchmark_runs() {
    reports::run(8);
}

#[test]
fn the_serial_link_benchmark_runs() {
    serial_link::run(true);
}

#[test]
fn the_station_screen_benchmark_runs() {
    station_screen::run(2, 100.0);
}
