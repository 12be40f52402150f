//! Output files, run as real processes: no output lands on an input or on another output of
//! the same run (compared as files, through any path), a link or a device at the output is
//! respected, an existing file keeps its mode, an interrupted run leaves no temporary file,
//! every output is opened before the work, and an input cannot exhaust memory. Each test is
//! named for what broke (issue 9, section 1).

use crate::common::{Ran, demo_copy, entries, ran};
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

/// Run `cistern ARGS` in `dir`.
fn cistern(dir: &Path, args: &[&str]) -> Ran {
    let mut command = Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.args(args).current_dir(dir);
    ran(command)
}

/// A simulation of the demo's recorded doses at two times, writing `-o OUT`.
fn simulate(out: &str) -> Vec<&str> {
    vec![
        "simulate",
        "--doses",
        "doses.csv",
        "--cl",
        "4.2",
        "--v",
        "48",
        "--ka",
        "1.1",
        "--at",
        "1,2",
        "-o",
        out,
    ]
}

/// The temporary files left in `dir`.
fn temporaries(dir: &Path) -> Vec<String> {
    entries(dir).into_iter().filter(|n| n.ends_with(".tmp")).collect()
}

fn is_root() -> bool {
    Command::new("id").arg("-u").output().is_ok_and(|o| o.stdout.trim_ascii() == b"0")
}

#[cfg(unix)]
fn mode(path: &Path) -> u32 {
    use std::os::unix::fs::PermissionsExt;
    std::fs::metadata(path).unwrap().permissions().mode() & 0o7777
}

#[test]
fn two_outputs_on_one_path_leave_the_old_file_alone() {
    let dir = demo_copy();
    let d = dir.path();
    let old = "the old contents\n";
    let cases: [&[&str]; 5] = [
        &["--svg", "out.csv"],
        &["--svg", "./out.csv"],
        &["--svg", "sub/../out.csv"],
        &["report", "p01.toml", "-o", "out.csv", "--svg", "out.csv"],
        &["sweep", "--case", "p01.toml", "-o", "out.csv", "--per-subject", "./out.csv"],
    ];
    std::fs::create_dir(d.join("sub")).unwrap();
    std::fs::write(d.join("out.csv"), old).unwrap();
    let before = entries(d);
    for extra in cases {
        std::fs::write(d.join("out.csv"), old).unwrap();
        let args = if extra[0].starts_with("--") {
            [simulate("out.csv"), extra.to_vec()].concat()
        } else {
            extra.to_vec()
        };
        let ran = cistern(d, &args);
        assert_eq!(ran.code, 2, "{args:?}: {}", ran.stderr);
        assert!(
            ran.stderr.contains("is also where -o writes ('out.csv'); give each output its own file"),
            "{}",
            ran.stderr
        );
        assert_eq!(std::fs::read_to_string(d.join("out.csv")).unwrap(), old, "{args:?} changed the file");
        assert_eq!(entries(d), before, "{args:?}");
    }
    // Two outputs on one path not there yet.
    std::fs::remove_file(d.join("out.csv")).unwrap();
    let before = entries(d);
    let ran = cistern(d, &[simulate("new.csv"), vec!["--svg", "sub/../new.csv"]].concat());
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(
        ran.stderr.contains("--svg: 'sub/../new.csv' is also where -o writes ('new.csv')"),
        "{}",
        ran.stderr
    );
    assert_eq!(entries(d), before);
}

#[test]
fn two_outputs_to_standard_output_are_refused() {
    let dir = demo_copy();
    let d = dir.path();
    let ran = cistern(d, &[simulate("-"), vec!["--svg", "-"]].concat());
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(
        ran.stderr.contains("--svg: -o also writes to standard output; give one of them a file"),
        "{}",
        ran.stderr
    );
    assert_eq!(ran.stdout, "");
    // The summary of a sweep goes to standard output when -o is left out.
    let sweep = ["sweep", "--case", "p01.toml", "--per-subject", "-"];
    let ran = cistern(d, &sweep);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("--per-subject: -o also writes to standard output"), "{}", ran.stderr);
    assert_eq!(ran.stdout, "");
}

#[cfg(unix)]
#[test]
fn an_output_over_an_input_by_another_path_is_refused() {
    let dir = demo_copy();
    let d = dir.path();
    let doses = std::fs::read(d.join("doses.csv")).unwrap();
    std::fs::hard_link(d.join("doses.csv"), d.join("hard.csv")).unwrap();
    std::os::unix::fs::symlink("doses.csv", d.join("soft.csv")).unwrap();
    std::os::unix::fs::symlink(".", d.join("here")).unwrap();
    let before = entries(d);
    for target in ["hard.csv", "soft.csv", "here/doses.csv"] {
        let ran = cistern(d, &simulate(target));
        assert_eq!(ran.code, 2, "-o {target}: {}", ran.stderr);
        assert!(
            ran.stderr.contains("-o: refusing to write the output over the input file 'doses.csv'"),
            "{}",
            ran.stderr
        );
        assert_eq!(std::fs::read(d.join("doses.csv")).unwrap(), doses, "-o {target} touched the input");
        assert_eq!(entries(d), before);
    }
}

/// Unmounts a bind mount when dropped.
struct Mounted(std::path::PathBuf);

impl Drop for Mounted {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(&self.0).status();
    }
}

#[test]
fn an_output_over_an_input_through_a_bind_mount_is_refused() {
    if !is_root() {
        eprintln!("skipped: a bind mount needs root");
        return;
    }
    let dir = demo_copy();
    let d = dir.path();
    std::fs::create_dir(d.join("a")).unwrap();
    std::fs::create_dir(d.join("b")).unwrap();
    std::fs::copy(d.join("doses.csv"), d.join("a/doses.csv")).unwrap();
    let mounted = Command::new("mount").args(["--bind", "a", "b"]).current_dir(d).output().unwrap();
    if !mounted.status.success() {
        eprintln!("skipped: mount --bind failed here: {}", String::from_utf8_lossy(&mounted.stderr));
        return;
    }
    let _mount = Mounted(d.join("b"));
    let doses = std::fs::read(d.join("a/doses.csv")).unwrap();
    let mut args = simulate("b/doses.csv");
    args[2] = "a/doses.csv";
    let ran = cistern(d, &args);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(
        ran.stderr.contains("refusing to write the output over the input file 'a/doses.csv'"),
        "{}",
        ran.stderr
    );
    assert_eq!(std::fs::read(d.join("a/doses.csv")).unwrap(), doses);
    assert_eq!(entries(&d.join("a")), ["doses.csv"]);
}

#[cfg(target_os = "linux")]
#[test]
fn planted_symlinks_cannot_redirect_the_output() {
    let dir = demo_copy();
    let d = dir.path();
    let victim = d.join("victim.txt");
    std::fs::write(&victim, "not yours\n").unwrap();
    // Links at the temporary names a run would have used, were they made of the output's name
    // and the next process numbers.
    let last: u32 = std::fs::read_to_string("/proc/sys/kernel/ns_last_pid").unwrap().trim().parse().unwrap();
    let planted: Vec<String> = (1..=500).map(|i| format!(".out.csv.{}.tmp", last + i)).collect();
    for name in &planted {
        std::os::unix::fs::symlink(&victim, d.join(name)).unwrap();
    }
    let ran = cistern(d, &simulate("out.csv"));
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert_eq!(std::fs::read_to_string(&victim).unwrap(), "not yours\n");
    let out = std::fs::symlink_metadata(d.join("out.csv")).unwrap();
    assert!(out.file_type().is_file(), "the output is not a regular file: {out:?}");
    assert!(std::fs::read_to_string(d.join("out.csv")).unwrap().starts_with("subject,time_h,conc_mg_l\n"));
    for name in &planted {
        assert!(std::fs::symlink_metadata(d.join(name)).unwrap().file_type().is_symlink(), "{name}");
    }
}

#[cfg(unix)]
#[test]
fn a_symlink_at_the_output_is_written_through_to_its_target() {
    let dir = demo_copy();
    let d = dir.path();
    std::fs::create_dir(d.join("real")).unwrap();
    std::fs::write(d.join("real/target.csv"), "old\n").unwrap();
    std::os::unix::fs::symlink("real/target.csv", d.join("link.csv")).unwrap();
    // A link to a file not there yet: the file is created.
    std::os::unix::fs::symlink("real/new.csv", d.join("dangling.csv")).unwrap();
    for (link, target) in [("link.csv", "real/target.csv"), ("dangling.csv", "real/new.csv")] {
        let ran = cistern(d, &simulate(link));
        assert_eq!(ran.code, 0, "{}", ran.stderr);
        assert!(
            std::fs::symlink_metadata(d.join(link)).unwrap().file_type().is_symlink(),
            "{link} was replaced"
        );
        let written = std::fs::read_to_string(d.join(target)).unwrap();
        assert!(written.starts_with("subject,time_h,conc_mg_l\n"), "{target}: {written}");
    }
    assert_eq!(entries(&d.join("real")), ["new.csv", "target.csv"]);
}

#[cfg(unix)]
#[test]
fn dev_null_as_the_output_stays_a_device() {
    use std::os::unix::fs::FileTypeExt;
    let dir = demo_copy();
    let d = dir.path();
    // As root a regression would replace the machine's /dev/null, so root writes to the same
    // device (character device 1, 3) made in the test's directory instead; anyone else cannot
    // replace /dev/null and writes to it.
    let null = if is_root() {
        let made = Command::new("mknod").args(["null", "c", "1", "3"]).current_dir(d).status().unwrap();
        assert!(made.success(), "mknod failed");
        "null".to_string()
    } else {
        "/dev/null".to_string()
    };
    let ran = cistern(d, &simulate(&null));
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let meta = std::fs::symlink_metadata(d.join(&null)).unwrap();
    assert!(meta.file_type().is_char_device(), "{null} is no longer a device: {meta:?}");
    assert!(temporaries(d).is_empty(), "{:?}", entries(d));
}

#[cfg(unix)]
#[test]
fn an_existing_output_keeps_its_mode_and_a_new_one_follows_the_umask() {
    use std::os::unix::fs::PermissionsExt;
    let dir = demo_copy();
    let d = dir.path();
    std::fs::write(d.join("kept.csv"), "old\n").unwrap();
    std::fs::set_permissions(d.join("kept.csv"), std::fs::Permissions::from_mode(0o600)).unwrap();
    let rerun = cistern(d, &simulate("kept.csv"));
    assert_eq!(rerun.code, 0, "{}", rerun.stderr);
    assert_eq!(mode(&d.join("kept.csv")), 0o600);
    assert!(std::fs::read_to_string(d.join("kept.csv")).unwrap().starts_with("subject,"));
    for (umask, expected) in [("022", 0o644), ("077", 0o600)] {
        let name = format!("new-{umask}.csv");
        let script = format!("umask {umask}; exec \"$0\" \"$@\"");
        let mut command = Command::new("sh");
        command.args(["-c", &script, env!("CARGO_BIN_EXE_cistern")]).args(simulate(&name)).current_dir(d);
        let result = ran(command);
        assert_eq!(result.code, 0, "{}", result.stderr);
        assert_eq!(mode(&d.join(&name)), expected, "umask {umask}");
    }
}

/// Start a simulation long enough to interrupt (twenty million rows), wait until its output has
/// grown past a megabyte, send `signal`, and return its exit code.
#[cfg(target_os = "linux")]
fn interrupted(dir: &Path, signal: &str) -> Option<i32> {
    let mut child = Command::new(env!("CARGO_BIN_EXE_cistern"))
        .args(["simulate", "--dose", "1g", "--every", "12h", "--count", "6", "--duration", "1h"])
        .args(["--cl", "4.2", "--v", "48", "--times", "0:20000h:0.001h", "--allow-large", "-o", "big.csv"])
        .current_dir(dir)
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let start = Instant::now();
    let grown = loop {
        let size = std::fs::read_dir(dir)
            .unwrap()
            .filter_map(|e| e.ok())
            .filter(|e| e.file_name().to_string_lossy().ends_with(".tmp"))
            .filter_map(|e| e.metadata().ok())
            .map(|m| m.len())
            .max();
        if size.is_some_and(|s| s > 1 << 20) || start.elapsed() > Duration::from_secs(120) {
            break size;
        }
        std::thread::sleep(Duration::from_millis(5));
    };
    assert!(grown.is_some(), "no temporary file appeared");
    Command::new("kill").args([signal, &child.id().to_string()]).status().unwrap();
    child.wait().unwrap().code()
}

#[cfg(target_os = "linux")]
#[test]
fn sigterm_or_ctrl_c_during_a_long_run_leaves_no_temporary_file() {
    for (signal, code) in [("-TERM", 143), ("-INT", 130)] {
        let dir = tempfile::tempdir().unwrap();
        assert_eq!(interrupted(dir.path(), signal), Some(code), "kill {signal}");
        assert_eq!(entries(dir.path()), Vec::<String>::new(), "kill {signal}");
    }
}

#[test]
fn an_empty_output_name_is_a_usage_error() {
    let dir = demo_copy();
    let before = entries(dir.path());
    let ran = cistern(dir.path(), &simulate(""));
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("-o: the output file name is empty"), "{}", ran.stderr);
    assert_eq!(entries(dir.path()), before);
}

#[test]
fn an_output_name_of_250_characters_works() {
    let dir = demo_copy();
    let name = format!("{}.csv", "a".repeat(246));
    let ran = cistern(dir.path(), &simulate(&name));
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(std::fs::read_to_string(dir.path().join(&name)).unwrap().starts_with("subject,"));
    assert!(temporaries(dir.path()).is_empty());
}

#[test]
fn sweep_with_an_unwritable_output_fails_before_the_work() {
    let dir = demo_copy();
    let d = dir.path();
    let before = entries(d);
    // Ten million subjects: a long time of work, were it done before the output is opened. The run is
    // stopped after two minutes so that such a regression fails instead of hanging.
    let mut child = Command::new(env!("CARGO_BIN_EXE_cistern"))
        .args(["sweep", "--case", "p01.toml", "--subjects", "10000000", "--per-subject", "rows.csv"])
        .args(["-o", "no/such/dir/summary.csv"])
        .current_dir(d)
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let start = Instant::now();
    while child.try_wait().unwrap().is_none() {
        if start.elapsed() > Duration::from_secs(120) {
            child.kill().unwrap();
            panic!("the sweep started its work before finding that -o cannot be written");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    let out = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{stderr}");
    assert!(stderr.contains("cannot create the output 'no/such/dir/summary.csv'"), "{stderr}");
    assert!(!stderr.contains("sweeping"), "the sweep started: {stderr}");
    assert_eq!(entries(d), before);
}

#[test]
fn dev_zero_or_a_huge_file_as_an_input_is_refused() {
    let dir = demo_copy();
    let d = dir.path();
    let mut args = simulate("out.csv");
    args[2] = "/dev/zero";
    let ran = cistern(d, &args);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("/dev/zero: this is a device, not a file"), "{}", ran.stderr);
    // A sparse file one byte over the cap (no disk is used).
    let huge = std::fs::File::create(d.join("huge.csv")).unwrap();
    huge.set_len(cistern::io::input::MAX_INPUT_BYTES + 1).unwrap();
    args[2] = "huge.csv";
    let ran = cistern(d, &args);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(
        ran.stderr.contains("huge.csv: the file is 1073741825 bytes, more than the 1 GiB"),
        "{}",
        ran.stderr
    );
    let ran = cistern(d, &["sweep", "--case", "p01.toml", "--model", "/dev/zero", "-o", "out.csv"]);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("/dev/zero: this is a device, not a file"), "{}", ran.stderr);
    assert!(!d.join("out.csv").exists());
}
