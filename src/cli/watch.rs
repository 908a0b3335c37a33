//! `modegram watch SETUP DIR`: decode each frame file as it appears in DIR and show live
//! alignment figures per channel (fringe period, separation margin, saturation, centring,
//! captured power, focus): one refreshing block on stderr on a terminal, else one line per
//! frame on stdout. Ends on Ctrl-C, after `--max-frames` frames, or after `--timeout-s`
//! seconds without a new frame, and prints a summary. Files are handled as described in
//! crate::align::watch (a half-written file is waited for; one that never completes is
//! reported). Frames of another size than the first are reported and skipped.
//!
//! Throughput: polls are at least `--poll-ms` apart, the decoding time counting towards the
//! interval. The ready files are decoded in rounds of two per thread, spread over the rayon
//! threads (a lone file: its channels in parallel), each thread with its own buffers; the
//! figures are shown in the files' order and do not depend on the split.
use super::{Common, Outcome};
use crate::align::calibrate::context;
use crate::align::live::{LiveChannel, LiveFigures, LiveScratch};
use crate::align::objective::geometry;
use crate::align::watch::{Watcher, FRAME_EXTENSIONS};
use crate::decode::{count_saturated, prepare, DecodeOptions, Prepared};
use crate::error::{Error, Result};
use crate::frames::FrameStack;
use crate::modes::Basis;
use crate::setup::Setup;
use clap::Args;
use num_complex::Complex64;
use rayon::prelude::*;
use serde_json::json;
use std::collections::VecDeque;
use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

#[derive(Debug, Args)]
pub struct WatchArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    /// Folder to watch for new frames (TIFF, PNG, NPY).
    pub dir: PathBuf,
    /// Stop after this many decoded frames (default: no limit).
    #[arg(long)]
    pub max_frames: Option<usize>,
    /// Stop after this many seconds without a new frame (default: no limit).
    #[arg(long)]
    pub timeout_s: Option<f64>,
    /// Folder poll interval, milliseconds (default 50).
    #[arg(long, default_value_t = 50)]
    pub poll_ms: u64,
    /// Seconds a file may stay incomplete or undecodable before it is reported (default 10).
    #[arg(long, default_value_t = 10.0)]
    pub give_up_s: f64,
    #[command(flatten)]
    pub common: Common,
}

static STOP: AtomicBool = AtomicBool::new(false);

#[cfg(unix)]
fn install_ctrlc() {
    extern "C" fn on_sigint(_: libc::c_int) {
        STOP.store(true, Ordering::SeqCst);
    }
    // SAFETY: the handler only stores to an atomic flag (async-signal-safe).
    unsafe {
        libc::signal(libc::SIGINT, on_sigint as *const () as libc::sighandler_t);
    }
}

#[cfg(not(unix))]
fn install_ctrlc() {}

/// Buffers of one worker: a frame and, per channel, the decode and live-figure scratch.
struct Worker {
    buf: Vec<f32>,
    chans: Vec<ChannelScratch>,
}

struct ChannelScratch {
    decode: crate::decode::Scratch,
    field: Vec<Complex64>,
    live: LiveScratch,
}

/// The decode plans and live-figure plans (read-only) plus one [`Worker`] per thread.
struct Live {
    prepared: Prepared,
    channels: Vec<LiveChannel>,
    workers: Vec<Worker>,
    width: usize,
    height: usize,
}

/// Figures per frame and channel of one file.
type FileFigures = Result<Vec<Vec<LiveFigures>>>;

impl Live {
    fn new(setup: &Setup, basis: &Basis, first: &Path) -> Result<Live> {
        let alignments = setup
            .channels
            .iter()
            .map(|c| geometry(&c.alignment()))
            .collect();
        let opts = DecodeOptions {
            alignments: Some(alignments),
            ..Default::default()
        };
        let prepared = prepare(setup, &[first.to_path_buf()], &opts)?;
        let ctx = context(setup, basis);
        let mut channels = Vec::new();
        for (c, ch) in setup.channels.iter().enumerate() {
            let info = &prepared.channels[c];
            let grid = info.grid();
            let a = ch.alignment();
            channels.push(LiveChannel::new(
                grid,
                ctx.wavelength_nm,
                a,
                basis.sample(&grid, &geometry(&a)),
                info.carrier_cycles_per_px,
                info.window_radius_cycles_per_px,
                info.fibre_bandwidth_cycles_per_px
                    .unwrap_or(info.window_radius_cycles_per_px),
                ch.fibre_pitch_um(&setup.camera),
                basis.core_radius_um,
                4.0 * ctx.depth_of_focus_um(),
            ));
        }
        let stack = FrameStack::open(&[first.to_path_buf()])?;
        let (width, height) = (stack.width(), stack.height());
        let workers = (0..rayon::current_num_threads().max(1))
            .map(|_| Worker {
                buf: vec![0f32; width * height],
                chans: prepared
                    .plans
                    .iter()
                    .zip(&channels)
                    .map(|(p, l)| ChannelScratch {
                        decode: p.scratch(),
                        field: vec![Complex64::new(0.0, 0.0); p.len()],
                        live: l.scratch(),
                    })
                    .collect(),
            })
            .collect();
        Ok(Live {
            prepared,
            channels,
            workers,
            width,
            height,
        })
    }

    /// Files decoded at once: two per worker, so that the view stays current.
    fn batch_len(&self) -> usize {
        2 * self.workers.len()
    }

    /// Decode the files of `paths` (at most [`Live::batch_len`]), results in their order:
    /// the files spread over the workers, or, for a single file, its channels over the
    /// threads. The figures do not depend on the split (LiveChannel carries no state).
    fn process_batch(&mut self, paths: &[PathBuf]) -> Vec<FileFigures> {
        let (prepared, channels) = (&self.prepared, &self.channels);
        let size = (self.width, self.height);
        if paths.len() == 1 {
            return vec![process(
                prepared,
                channels,
                size,
                &mut self.workers[0],
                &paths[0],
                true,
            )];
        }
        let per = paths.len().div_ceil(self.workers.len());
        let mut out: Vec<Vec<FileFigures>> = paths
            .par_chunks(per)
            .zip(self.workers.par_iter_mut())
            .map(|(chunk, w)| {
                chunk
                    .iter()
                    .map(|p| process(prepared, channels, size, w, p, false))
                    .collect()
            })
            .collect();
        out.drain(..).flatten().collect()
    }
}

/// Decode every frame of `path` with the buffers of `w`; channels on several threads when
/// `parallel`.
fn process(
    prepared: &Prepared,
    channels: &[LiveChannel],
    (width, height): (usize, usize),
    w: &mut Worker,
    path: &Path,
    parallel: bool,
) -> FileFigures {
    let mut stack = FrameStack::open(&[path.to_path_buf()])?.allow_blank();
    if (stack.width(), stack.height()) != (width, height) {
        return Err(Error::frame(
            path,
            Some(0),
            format!(
                "frame is {}x{} pixels, the watched frames (and the setup's regions) are {width}x{height}",
                stack.width(),
                stack.height(),
            ),
        ));
    }
    let mut out = Vec::new();
    while stack.read_next(&mut w.buf)?.is_some() {
        let buf = &w.buf;
        let one = |(c, s): (usize, &mut ChannelScratch)| {
            let plan = &prepared.plans[c];
            plan.decode(buf, &mut s.decode, &mut s.field);
            let [_, _, rw, rh] = plan.spec.region;
            let sat = match prepared.saturation_counts {
                Some(l) => {
                    count_saturated(buf, width, plan.spec.region, l) as f64 / (rw * rh) as f64
                }
                None => 0.0,
            };
            channels[c].measure_with(&s.field, sat, &mut s.live)
        };
        let figs: Vec<LiveFigures> = if parallel && w.chans.len() > 1 {
            w.chans.par_iter_mut().enumerate().map(one).collect()
        } else {
            w.chans.iter_mut().enumerate().map(one).collect()
        };
        out.push(figs);
    }
    Ok(out)
}

fn line(names: &[String], figs: &[LiveFigures]) -> String {
    names
        .iter()
        .zip(figs)
        .map(|(n, f)| {
            format!(
                "{n}: period {:.2} px, separation {:.2}, saturated {:.3}%, centring {:.1}%, captured {:.3}, focus {:+.1} um",
                f.fringe_period_px,
                f.separation,
                100.0 * f.saturated_fraction,
                100.0 * f.centring,
                f.captured,
                f.focus_um
            )
        })
        .collect::<Vec<_>>()
        .join(" | ")
}

pub fn run(args: &WatchArgs) -> Result<Outcome> {
    let setup = Setup::load(&args.setup)?;
    if setup.channels.is_empty() {
        return Err(Error::setup(
            setup.file_name(),
            "channel",
            "(none)",
            "define at least one [[channel]]",
        ));
    }
    let basis = Basis::from_setup(&setup)?;
    if !(args.give_up_s.is_finite() && args.give_up_s > 0.0) {
        return Err(Error::Input(format!(
            "--give-up-s {}: must be > 0",
            args.give_up_s
        )));
    }
    if let Some(t) = args.timeout_s {
        if !(t.is_finite() && t > 0.0) {
            return Err(Error::Input(format!("--timeout-s {t}: must be > 0")));
        }
    }
    let mut watcher = Watcher::new(&args.dir, Duration::from_secs_f64(args.give_up_s))?;
    install_ctrlc();
    let names: Vec<String> = setup.channels.iter().map(|c| c.name.clone()).collect();
    let tty = std::io::stderr().is_terminal() && !args.common.quiet;
    let start = Instant::now();
    let mut last_new = Instant::now();
    let mut live: Option<Live> = None;
    let mut frames = 0usize;
    let mut problems: Vec<String> = Vec::new();
    let mut sums = vec![(0.0f64, f64::INFINITY); names.len()];
    let mut last: Option<Vec<LiveFigures>> = None;
    let mut block_lines = 0usize;
    let stdout = std::io::stdout();
    let reason;
    let interval = Duration::from_millis(args.poll_ms);
    let mut last_poll: Option<Instant> = None;
    'outer: loop {
        if STOP.load(Ordering::SeqCst) {
            reason = "interrupted";
            break;
        }
        // polls at least --poll-ms apart (the half-written-file test relies on it); the time
        // spent decoding counts towards the interval
        if let Some(t) = last_poll {
            std::thread::sleep(interval.saturating_sub(t.elapsed()));
        }
        last_poll = Some(Instant::now());
        let (ready, gave_up) = watcher.poll()?;
        for g in gave_up {
            problems.push(format!("{}: {}", g.path.display(), g.reason));
            super::warn(args.common.quiet, problems.last().unwrap());
        }
        let mut queue: VecDeque<PathBuf> = ready.into();
        while !queue.is_empty() {
            if STOP.load(Ordering::SeqCst) {
                continue 'outer;
            }
            if live.is_none() {
                let path = queue.front().expect("not empty").clone();
                match Live::new(&setup, &basis, &path) {
                    Ok(l) => live = Some(l),
                    Err(e @ Error::Setup { .. }) => return Err(e),
                    Err(e) => {
                        queue.pop_front();
                        if let Some(g) = watcher.retry(&path, &e.to_string()) {
                            problems.push(format!("{}: {}", g.path.display(), g.reason));
                            super::warn(args.common.quiet, problems.last().unwrap());
                        }
                        continue;
                    }
                }
            }
            let l = live.as_mut().expect("prepared above");
            let mut take = queue.len().min(l.batch_len());
            if let Some(m) = args.max_frames {
                take = take.min(m.saturating_sub(frames).max(1));
            }
            let batch: Vec<PathBuf> = queue.drain(..take).collect();
            let results = l.process_batch(&batch);
            for (path, result) in batch.iter().zip(results) {
                match result {
                    Ok(figs) => {
                        watcher.done(path);
                        last_new = Instant::now();
                        let name = path
                            .file_name()
                            .map(|n| n.to_string_lossy().to_string())
                            .unwrap_or_default();
                        for f in figs {
                            frames += 1;
                            for (s, x) in sums.iter_mut().zip(&f) {
                                s.0 += x.captured;
                                s.1 = s.1.min(x.captured);
                            }
                            if tty {
                                let mut err = std::io::stderr().lock();
                                if block_lines > 0 {
                                    let _ = write!(err, "\x1b[{block_lines}A");
                                }
                                let _ = writeln!(
                                    err,
                                    "\x1b[2Kframe {frames} ({name}), {:.1} frames/s",
                                    frames as f64 / start.elapsed().as_secs_f64().max(1e-9)
                                );
                                for (n, x) in names.iter().zip(&f) {
                                    let _ = writeln!(
                                        err,
                                        "\x1b[2K  {}",
                                        line(std::slice::from_ref(n), std::slice::from_ref(x))
                                    );
                                }
                                block_lines = 1 + names.len();
                            } else if !args.common.json {
                                let _ = writeln!(
                                    stdout.lock(),
                                    "frame {frames} {name} | {}",
                                    line(&names, &f)
                                );
                            }
                            last = Some(f);
                            if args.max_frames.is_some_and(|m| frames >= m) {
                                reason = "reached --max-frames";
                                break 'outer;
                            }
                        }
                    }
                    Err(e @ Error::Frame { .. })
                        if e.to_string().contains("pixels, the watched frames") =>
                    {
                        watcher.done(path);
                        problems.push(e.to_string());
                        super::warn(args.common.quiet, &e.to_string());
                    }
                    Err(e) => {
                        if let Some(g) = watcher.retry(path, &e.to_string()) {
                            problems.push(format!("{}: {}", g.path.display(), g.reason));
                            super::warn(args.common.quiet, problems.last().unwrap());
                        }
                    }
                }
            }
        }
        if let Some(t) = args.timeout_s {
            if last_new.elapsed().as_secs_f64() >= t {
                reason = "no new frame within --timeout-s";
                break;
            }
        }
    }
    let elapsed = start.elapsed().as_secs_f64();
    if frames == 0 {
        let mut msg = format!(
            "watch folder {}: no frame decoded ({reason}; looked for files ending in {})",
            args.dir.display(),
            FRAME_EXTENSIONS.map(|e| format!(".{e}")).join(", ")
        );
        if !problems.is_empty() {
            msg.push_str(&format!("; problems: {}", problems.join("; ")));
        }
        return Err(Error::Input(msg));
    }
    let mut table = format!(
        "watched {} for {elapsed:.1} s ({reason}): {frames} frames, {:.1} frames/s, {} problem file(s)\n",
        args.dir.display(),
        frames as f64 / elapsed.max(1e-9),
        problems.len()
    );
    let rows: Vec<Vec<String>> = names
        .iter()
        .enumerate()
        .map(|(c, n)| {
            let l = last.as_ref().map(|f| f[c]).unwrap_or_default();
            vec![
                n.clone(),
                format!("{:.4}", sums[c].0 / frames as f64),
                format!("{:.4}", sums[c].1),
                format!("{:.2}", l.fringe_period_px),
                format!("{:.2}", l.separation),
                format!("{:.1}%", 100.0 * l.centring),
                format!("{:+.1}", l.focus_um),
            ]
        })
        .collect();
    table.push_str(&super::table(
        &[
            "channel",
            "mean captured",
            "min captured",
            "last period px",
            "last separation",
            "last centring",
            "last focus um",
        ],
        &rows,
    ));
    for p in &problems {
        table.push_str(&format!("problem: {p}\n"));
    }
    let json = json!({
        "frames": frames,
        "elapsed_s": elapsed,
        "frames_per_s": frames as f64 / elapsed.max(1e-9),
        "stopped": reason,
        "problems": problems,
        "channels": names.iter().enumerate().map(|(c, n)| json!({
            "name": n,
            "mean_captured": sums[c].0 / frames as f64,
            "min_captured": sums[c].1,
            "last": last.as_ref().map(|f| f[c]),
        })).collect::<Vec<_>>(),
    });
    Ok(Outcome {
        table,
        json,
        failed: false,
    })
}
