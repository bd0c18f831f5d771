//! The `leeward process` command as an operator meets it: exit codes, messages
//! naming the file and the reason, the run going on past bad input, and no
//! partial file ever left in the output directory.

mod common;

use std::path::Path;
use std::process::Command;

fn run(args: &[&str]) -> (i32, String, String) {
    let out = Command::new(common::leeward_bin())
        .args(args)
        .output()
        .expect("run leeward");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn tmp(name: &str) -> std::path::PathBuf {
    let d = std::env::temp_dir().join(format!("leeward-cli-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn nc_files(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

#[test]
fn good_bad_and_nothing_exit_codes() {
    let d = tmp("codes");
    let inputs =
        leeward::demo::write_inputs(&d.join("in"), leeward::demo::default_cycle(), &[0, 6])
            .unwrap();
    let good: Vec<&str> = inputs.iter().map(|p| p.to_str().unwrap()).collect();
    let out = d.join("out");
    let out_s = out.to_str().unwrap();

    // All good: 0, one file per step, and the cycle's cyclone tracks.
    let mut args = vec!["process", "--out", out_s];
    args.extend(&good);
    let (code, stdout, _) = run(&args);
    assert_eq!(code, 0, "{stdout}");
    assert_eq!(
        nc_files(&out),
        vec![
            "c255_20260314T0000Z_000h.nc",
            "c255_20260314T0000Z_006h.nc",
            "c255_20260314T0000Z_cyclones.geojson",
            "c255_20260314T0000Z_cyclones.nc"
        ]
    );
    let before = std::fs::read(out.join("c255_20260314T0000Z_000h.nc")).unwrap();

    // A truncated copy, an empty file and garbage beside good input: 3, each named with its reason.
    let bytes = std::fs::read(&inputs[1]).unwrap();
    let cut = d.join("in/cut.grib2");
    // Not on a message boundary: the last message is cut short.
    std::fs::write(&cut, &bytes[..bytes.len() / 3 + 1000]).unwrap();
    let empty = d.join("in/empty.grib2");
    std::fs::write(&empty, b"").unwrap();
    let junk = d.join("in/junk.grib2");
    std::fs::write(&junk, b"GRIB\x00\x00\x00\x02not really a message").unwrap();
    let out2 = d.join("out2");
    let (code, stdout, stderr) = run(&[
        "process",
        "--out",
        out2.to_str().unwrap(),
        good[0],
        cut.to_str().unwrap(),
        empty.to_str().unwrap(),
        junk.to_str().unwrap(),
    ]);
    assert_eq!(code, 3, "{stdout}\n{stderr}");
    assert!(
        stderr.contains("cut.grib2") && stderr.contains("truncated"),
        "{stderr}"
    );
    assert!(
        stderr.contains("empty.grib2") && stderr.contains("empty file"),
        "{stderr}"
    );
    assert!(stderr.contains("junk.grib2"), "{stderr}");
    assert!(nc_files(&out2).contains(&"c255_20260314T0000Z_000h.nc".to_string()));

    // Only bad input: 4, and the earlier products are untouched.
    let (code, _, stderr) = run(&["process", "--out", out_s, empty.to_str().unwrap()]);
    assert_eq!(code, 4, "{stderr}");
    assert_eq!(
        std::fs::read(out.join("c255_20260314T0000Z_000h.nc")).unwrap(),
        before
    );
    for dir in [&out, &out2] {
        assert!(
            nc_files(dir).iter().all(|n| !n.starts_with('.')),
            "temporary left in {}",
            dir.display()
        );
    }
    let _ = std::fs::remove_dir_all(&d);
}

#[test]
fn invalid_config_is_a_usage_error_naming_every_key() {
    let d = tmp("config");
    let cfg = d.join("bad.toml");
    std::fs::write(
        &cfg,
        "[products]\nvorticity = false\nstability = false\nisobaric_pv = false\nisentropic = false\ntropopause = false\nlayer_pv = false\nthickness = false\n[output]\ndeflate_level = 11\n",
    )
    .unwrap();
    let inputs =
        leeward::demo::write_inputs(&d.join("in"), leeward::demo::default_cycle(), &[0]).unwrap();
    let (code, _, stderr) = run(&[
        "process",
        "--config",
        cfg.to_str().unwrap(),
        "--out",
        d.join("out").to_str().unwrap(),
        inputs[0].to_str().unwrap(),
    ]);
    assert_eq!(code, 2);
    assert!(
        stderr.contains("output.deflate_level") && stderr.contains("products"),
        "{stderr}"
    );
    let (code, _, stderr) = run(&["process", "--out", "x"]);
    assert_eq!(code, 2, "{stderr}");
    let _ = std::fs::remove_dir_all(&d);
}

#[test]
fn help_documents_the_exit_codes() {
    let (code, stdout, _) = run(&["process", "--help"]);
    assert_eq!(code, 0);
    assert!(
        stdout.contains("3 some input was unusable") && stdout.contains("4 nothing could be done")
    );
}

#[test]
fn unwritable_output_directory_is_reported_not_a_crash() {
    // A file where the output directory should be.
    let d = tmp("unwritable");
    let inputs =
        leeward::demo::write_inputs(&d.join("in"), leeward::demo::default_cycle(), &[0]).unwrap();
    let blocker = d.join("out");
    std::fs::write(&blocker, b"a file, not a directory").unwrap();
    let (code, _, stderr) = run(&[
        "process",
        "--out",
        blocker.to_str().unwrap(),
        inputs[0].to_str().unwrap(),
    ]);
    assert_eq!(code, 4, "{stderr}");
    assert!(stderr.contains("out"), "{stderr}");
    let _ = std::fs::remove_dir_all(&d);
}

#[test]
fn the_example_config_lists_the_defaults() {
    // deploy/leeward.toml documents every key with its default: it must parse to exactly them.
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy/leeward.toml");
    let mut cfg = leeward::config::Config::load(&path).expect("example config parses");
    // Its one feed is an example, not a default; the service's settings are defaults.
    assert_eq!(cfg.feed.len(), 1);
    let rule = leeward::service::settings::FeedRule::new(&cfg.feed[0], &cfg.service, &cfg.products)
        .expect("the example feed is usable");
    assert!(matches!(
        rule.role("regional_2026031400_f006.grib2"),
        Some(leeward::service::settings::FileRole::Data(_))
    ));
    cfg.feed.clear();
    assert_eq!(cfg, leeward::config::Config::default());
}

#[test]
fn the_committed_demo_sample_is_what_the_generator_writes() {
    // demo-data/grib2 holds one step of each invented model, as written by
    // `leeward demo --inputs-only --leads 24`: the generator must still write the
    // same fields (compared decoded, within the packing's precision, so that a
    // last-bit difference of a maths library elsewhere does not matter).
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/grib2");
    let d = std::env::temp_dir().join(format!("leeward-sample-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    let cycle = leeward::demo::default_cycle();
    let fresh = [
        leeward::demo::write_inputs(&d.join("r"), cycle, &[24]).unwrap(),
        leeward::demo::write_global_inputs(&d.join("g"), cycle, &[24]).unwrap(),
    ];
    for f in fresh.iter().flatten() {
        let name = f.file_name().unwrap();
        let committed = std::fs::read(root.join(name)).expect("committed sample");
        let now = std::fs::read(f).unwrap();
        let (a, b) = (
            leeward::ingest::catalogue::catalogue(&committed),
            leeward::ingest::catalogue::catalogue(&now),
        );
        assert_eq!(a.fields.len(), b.fields.len(), "{name:?}");
        assert!(a.fields.len() > 100, "{name:?}: {} fields", a.fields.len());
        for (x, y) in a.fields.iter().zip(&b.fields) {
            assert_eq!(
                (x.discipline, x.category, x.number),
                (y.discipline, y.category, y.number)
            );
            assert_eq!(x.level, y.level);
            let va = leeward::ingest::decode::decode_raw(&committed, x).unwrap();
            let vb = leeward::ingest::decode::decode_raw(&now, y).unwrap();
            let range = va.iter().fold(0f32, |m, v| m.max(v.abs())).max(1.0);
            let worst = va
                .iter()
                .zip(&vb)
                .map(|(p, q)| (p - q).abs())
                .fold(0f32, f32::max);
            assert!(worst <= 1e-3 * range, "{name:?} field {}: {worst}", x.index);
        }
    }
    let _ = std::fs::remove_dir_all(&d);
}

#[test]
fn check_config_names_every_planted_error_and_completions_and_man_pages_come_out() {
    let d = std::env::temp_dir().join(format!("leeward-check-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    let bad = d.join("bad.toml");
    std::fs::write(
        &bad,
        "[output]\ndeflate_level = 12\nspeed = 3\n[isentropic]\nsurfaces = [300.0, 290.0]\n\
         [service]\nworkers = 0\n[service.slurm]\nresult_grace_s = -1.0\n[quicklook]\nimages = [\"no good\"]\n\
         [[feed]]\nname = \"x y\"\ncomplete = \"files\"\nfiles_per_step = 0\n",
    )
    .unwrap();
    let (code, _, stderr) = run(&["check-config", bad.to_str().unwrap()]);
    assert_eq!(code, 2, "{stderr}");
    for key in [
        "output.speed",
        "output.deflate_level",
        "isentropic.surfaces",
        "service.workers",
        "service.slurm.result_grace_s",
        "quicklook.images[0]",
        "feed[0].name",
        "feed[0].files_per_step",
    ] {
        assert!(stderr.contains(key), "{key} not named:\n{stderr}");
    }
    let (code, stdout, _) = run(&["check-config", "deploy/leeward.toml"]);
    assert_eq!(code, 0);
    assert!(
        stdout.contains("[service]") && stdout.contains("step_timeout_s = 2700.0"),
        "{stdout}"
    );
    let (code, stdout, _) = run(&["completions", "bash"]);
    assert_eq!(code, 0);
    assert!(stdout.contains("serve") && stdout.contains("check-config"));
    let (code, _, _) = run(&["man", "--out", d.join("man").to_str().unwrap()]);
    assert_eq!(code, 0);
    let page = std::fs::read_to_string(d.join("man/leeward-serve.1")).unwrap();
    assert!(
        page.contains(".TH") && page.contains("state\\-dir"),
        "{page}"
    );
    let _ = std::fs::remove_dir_all(&d);
}

#[test]
fn a_listing_into_a_closed_pipe_ends_quietly() {
    // `leeward inspect FILE | head -1`: the reader leaves after one line; leeward
    // must end as Unix tools do (SIGPIPE; common practice), never with a panic message.
    use std::io::Read;
    use std::process::Stdio;
    let demo = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/demo-data/grib2/lwdemo_2026031400_024.grib2"
    );
    let mut child = Command::new(env!("CARGO_BIN_EXE_leeward"))
        .args(["inspect", "--json", demo])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start leeward");
    let mut first = [0u8; 16];
    let mut out = child.stdout.take().expect("stdout");
    out.read_exact(&mut first).expect("some output");
    drop(out);
    let mut err = String::new();
    child
        .stderr
        .take()
        .expect("stderr")
        .read_to_string(&mut err)
        .expect("stderr");
    let status = child.wait().expect("wait");
    assert!(!err.contains("panicked"), "{err}");
    assert!(err.is_empty(), "nothing on stderr: {err}");
    use std::os::unix::process::ExitStatusExt;
    assert!(
        status.success() || status.signal() == Some(13),
        "{status:?}"
    );
}

/// Run leeward with a deadline: (exit code, stdout, stderr), or a failure
/// naming the command when it has not ended by then (it waited on something).
fn run_within(args: &[&std::ffi::OsStr], secs: u64) -> (i32, String, String) {
    use std::process::Stdio;
    let mut child = Command::new(common::leeward_bin())
        .args(args)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start leeward");
    let t = std::time::Instant::now();
    while child.try_wait().expect("wait").is_none() {
        if t.elapsed() > std::time::Duration::from_secs(secs) {
            let _ = child.kill();
            let _ = child.wait();
            panic!("leeward {args:?} still running after {secs} s: it waited on its input");
        }
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    let out = child.wait_with_output().expect("output");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn special_files_are_refused_at_once_naming_path_and_kind() {
    let d = tmp("special");
    let fifo = d.join("pipe_000.grib2");
    let made = Command::new("mkfifo").arg(&fifo).status().expect("mkfifo");
    assert!(made.success());
    let sock = d.join("sock_000.grib2");
    let _listener = std::os::unix::net::UnixListener::bind(&sock).expect("socket");
    let dir = d.join("dir_000.grib2");
    std::fs::create_dir(&dir).unwrap();
    let out = d.join("out");
    let expect = [
        (&fifo, "a FIFO (named pipe), not a regular file"),
        (&sock, "a socket, not a regular file"),
        (&dir, "a directory, not a regular file"),
    ];
    for cmd in [
        vec!["inspect"],
        vec!["process", "--out", out.to_str().unwrap()],
    ] {
        let mut args: Vec<&std::ffi::OsStr> = cmd.iter().map(std::ffi::OsStr::new).collect();
        args.extend([fifo.as_os_str(), sock.as_os_str(), dir.as_os_str()]);
        args.push(std::ffi::OsStr::new("/dev/null"));
        // A FIFO opened for reading with no writer waits for ever: the
        // command must refuse it by its kind without opening it.
        let (code, _, stderr) = run_within(&args, 60);
        assert_eq!(code, 4, "{cmd:?}: {stderr}");
        for (path, why) in &expect {
            let line = format!("leeward: {}: {why}", path.display());
            assert!(
                stderr.lines().any(|l| l == line),
                "{cmd:?}: {line}\n{stderr}"
            );
        }
        assert!(
            stderr
                .lines()
                .any(|l| l == "leeward: /dev/null: a character device, not a regular file"),
            "{stderr}"
        );
    }
    let _ = std::fs::remove_dir_all(&d);
}

/// The messages of a GRIB2 file (section 0 gives each one's total length,
/// octets 9-16; WMO-No. 306, Manual on Codes, GRIB2 regulations).
fn grib_messages(bytes: &[u8]) -> Vec<&[u8]> {
    let mut out = Vec::new();
    let mut k = 0;
    while k + 16 <= bytes.len() && &bytes[k..k + 4] == b"GRIB" {
        let n = u64::from_be_bytes(bytes[k + 8..k + 16].try_into().unwrap()) as usize;
        out.push(&bytes[k..k + n]);
        k += n;
    }
    out
}

#[test]
fn a_file_with_nothing_usable_says_what_was_missing_on_standard_error() {
    let d = tmp("nothing");
    let inputs =
        leeward::demo::write_inputs(&d.join("in"), leeward::demo::default_cycle(), &[0]).unwrap();
    let bytes = std::fs::read(&inputs[0]).unwrap();
    // Only the eastward wind (discipline 0, category 2, number 2; WMO code
    // table 4.2) of the demo step: no product can be made from it alone.
    let cat = leeward::ingest::catalogue::catalogue(&bytes);
    let u_only: Vec<u8> = grib_messages(&bytes)
        .into_iter()
        .filter(|m| {
            let c = leeward::ingest::catalogue::catalogue(m);
            c.fields
                .iter()
                .all(|f| (f.discipline, f.category, f.number) == (0, 2, 2))
        })
        .flatten()
        .copied()
        .collect();
    assert!(cat.fields.len() > 10 && !u_only.is_empty());
    let file = d.join("in/u_only.grib2");
    std::fs::write(&file, &u_only).unwrap();
    let out = d.join("out");
    let (code, stdout, stderr) = run_within(
        &[
            "process".as_ref(),
            "--out".as_ref(),
            out.as_os_str(),
            file.as_os_str(),
        ],
        120,
    );
    assert_eq!(code, 4, "{stdout}\n{stderr}");
    let line = stderr
        .lines()
        .find(|l| l.starts_with(&format!("leeward: {}: nothing usable: ", file.display())))
        .unwrap_or_else(|| panic!("no line names the file:\n{stderr}"));
    assert!(
        line.contains("no isobaric temperature, v, geopotential height for step"),
        "{line}"
    );
    assert!(
        line.contains("u-component of wind"),
        "what the file gave: {line}"
    );
    // The real sample with one surface field (no isobaric ones at all), where
    // the samples are.
    if let Some(s) = common::samples_dir("nothing usable in a real sample") {
        let f = s.join("scanning-mode.grib2");
        let (code, _, stderr) = run_within(
            &[
                "process".as_ref(),
                "--out".as_ref(),
                out.as_os_str(),
                f.as_os_str(),
            ],
            120,
        );
        assert_eq!(code, 4, "{stderr}");
        let want = format!(
            "leeward: {}: nothing usable: no isobaric temperature, u, v, geopotential height",
            f.display()
        );
        assert!(stderr.lines().any(|l| l.starts_with(&want)), "{stderr}");
    }
    let _ = std::fs::remove_dir_all(&d);
}

#[test]
fn inspect_says_on_standard_error_what_made_its_exit_code() {
    // A message whose grid definition template is not one leeward reads (our
    // own demo message with section 3's template number, octets 13-14, set to
    // 3.32769, in the centre-local range of code table 3.1) beside a good one.
    let d = tmp("inspect-stderr");
    let inputs =
        leeward::demo::write_inputs(&d.join("in"), leeward::demo::default_cycle(), &[0]).unwrap();
    let bytes = std::fs::read(&inputs[0]).unwrap();
    let msgs = grib_messages(&bytes);
    let mut bad = msgs[0].to_vec();
    // Section 1's length, then section 3 (the demo writes no section 2).
    let s1 = u32::from_be_bytes(bad[16..20].try_into().unwrap()) as usize;
    let s3 = 16 + s1;
    assert_eq!(bad[s3 + 4], 3, "section 3 follows section 1");
    bad[s3 + 12..s3 + 14].copy_from_slice(&32769u16.to_be_bytes());
    let mut data = bad.clone();
    data.extend_from_slice(msgs[1]);
    let file = d.join("in/local_grid.grib2");
    std::fs::write(&file, &data).unwrap();
    let (code, stdout, stderr) = run_within(&["inspect".as_ref(), file.as_os_str()], 60);
    assert_eq!(code, 3, "{stdout}\n{stderr}");
    let lines: Vec<&str> = stderr.lines().collect();
    assert_eq!(
        lines.len(),
        1,
        "one line for the one unusable field: {stderr}"
    );
    assert!(
        lines[0].starts_with(&format!("leeward: {}: field 0 (", file.display()))
            && lines[0].contains("template 3.32769"),
        "{stderr}"
    );
    // A good file alone: exit 0 and nothing on standard error.
    let (code, _, stderr) = run_within(&["inspect".as_ref(), inputs[0].as_os_str()], 60);
    assert_eq!((code, stderr.as_str()), (0, ""));
    let _ = std::fs::remove_dir_all(&d);
}

#[test]
fn command_line_overrides_meet_the_same_checks_as_the_file() {
    // The directory overrides used to be applied after validation, so an
    // output tree or state directory put inside the watched one by the
    // command line got past the check the same setting in the file meets.
    // The rule is leeward's own: an override is a setting like any other.
    let d = tmp("overrides");
    let cfg = d.join("leeward.toml");
    std::fs::write(
        &cfg,
        "[[feed]]\nname = \"m\"\ncomplete = \"files\"\nfiles_per_step = 1\n",
    )
    .unwrap();
    let w = d.join("in");
    for (flag, key) in [
        ("--state-dir", "service.state_dir"),
        ("--out-dir", "service.out_dir"),
    ] {
        let mut args: Vec<std::ffi::OsString> = vec![
            "serve".into(),
            "--config".into(),
            cfg.clone().into(),
            "--watch-dir".into(),
            w.clone().into(),
            "--out-dir".into(),
            d.join("out").into(),
            "--state-dir".into(),
            d.join("state").into(),
        ];
        let k = args.iter().position(|a| a == flag).unwrap();
        args[k + 1] = w.join("mine").into();
        let refs: Vec<&std::ffi::OsStr> = args.iter().map(|a| a.as_os_str()).collect();
        let (code, _, stderr) = run_within(&refs, 30);
        assert_eq!(code, 2, "{flag} inside the watched directory: {stderr}");
        assert!(
            stderr.contains(key) && stderr.contains("inside service.watch_dir"),
            "{flag} inside the watched directory not refused by name:\n{stderr}"
        );
    }
    let _ = std::fs::remove_dir_all(&d);
}
