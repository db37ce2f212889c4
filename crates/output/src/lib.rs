//! # baton-output: a command's output files, written all or nothing
//!
//! A command names its outputs up front ([`Outputs::open`]), fills each
//! ([`Outputs::write_with`]) and finally commits them together
//! ([`Outputs::commit`]). What a destination is decides how it is written:
//!
//! * `-` is standard output; at most one output of a command may use it
//!   (so is a path that is standard output, such as `/dev/stdout`);
//! * a regular file, or a name that does not exist yet, is written to a
//!   temporary file in the same directory and renamed onto it on commit, so a
//!   reader never sees half a file and a failed command leaves the old file;
//!   a symbolic link is followed, and its target (not the link) is replaced;
//! * anything else that exists (a device such as `/dev/null`, a FIFO) cannot
//!   be replaced and is written in place, after every regular file is ready.
//!
//! Commit order: every regular file is staged first (and, when asked for
//! with [`Outputs::durable`], flushed to the disk); then standard output and
//! the in-place destinations are written; only when all of that succeeded
//! are the staged files renamed onto their destinations. A failure at any
//! point before the renames leaves every regular destination as it was.
//!
//! It deliberately knows nothing about what the bytes are: reports, charts
//! and tables are made elsewhere.
#![warn(missing_docs)]

use std::fs;
use std::io::{self, Write};
use std::path::{Path, PathBuf};

use thiserror::Error;

/// Why outputs could not be written.
#[derive(Debug, Error)]
pub enum OutputError {
    /// Two options send their output to standard output.
    #[error("{first} and {second} both write to standard output; at most one output may use it")]
    TwoStdout {
        /// The first option.
        first: String,
        /// The second option.
        second: String,
    },
    /// Two options name the same file.
    #[error("{first} and {second} both write {path}")]
    SameFile {
        /// The first option.
        first: String,
        /// The second option.
        second: String,
        /// The file both name.
        path: String,
    },
    /// The destination cannot be written (the system's reason).
    #[error("cannot write {path}: {message}")]
    Write {
        /// The destination as the user gave it.
        path: String,
        /// The system's reason.
        message: String,
    },
}

impl OutputError {
    /// Whether the error is in how the command was called (exit status 2)
    /// rather than in writing (exit status 1).
    pub fn is_usage(&self) -> bool {
        matches!(self, OutputError::TwoStdout { .. } | OutputError::SameFile { .. })
    }
}

/// Where one output goes, after following symbolic links.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Destination {
    /// Standard output (`-`, or a path that is the same file).
    Stdout,
    /// A regular file or a new one: staged beside `target` and renamed onto it.
    File {
        /// The file replaced (links followed).
        target: PathBuf,
    },
    /// A device, FIFO or other file that is not regular: written in place.
    InPlace {
        /// The destination (links followed).
        path: PathBuf,
    },
}

/// Most symbolic links followed for one path (as the system's own limit).
const MAX_LINKS: usize = 40;

fn write_error(path: &Path, e: impl std::fmt::Display) -> OutputError {
    OutputError::Write { path: path.display().to_string(), message: e.to_string() }
}

/// Paths the kernel resolves itself (`/proc/<pid>/fd/N`, `/dev/fd/N`): their
/// link text is not a path one can rename onto (`pipe:[1234]`).
fn resolved_by_kernel(p: &Path) -> bool {
    p.starts_with("/proc") || p.starts_with("/dev/fd")
}

/// Whether `m` describes the file standard output is connected to.
#[cfg(unix)]
fn is_stdout(m: &fs::Metadata) -> bool {
    use std::os::fd::AsFd;
    use std::os::unix::fs::MetadataExt;
    let Ok(fd) = io::stdout().as_fd().try_clone_to_owned() else { return false };
    let Ok(out) = fs::File::from(fd).metadata() else { return false };
    out.dev() == m.dev() && out.ino() == m.ino()
}

#[cfg(not(unix))]
fn is_stdout(_: &fs::Metadata) -> bool {
    false
}

/// Classifies `path` (see the crate documentation).
pub fn destination(path: &Path) -> Result<Destination, OutputError> {
    if path.as_os_str() == "-" {
        return Ok(Destination::Stdout);
    }
    let mut p = path.to_path_buf();
    for _ in 0..=MAX_LINKS {
        if resolved_by_kernel(&p) {
            let m = fs::metadata(&p).map_err(|e| write_error(path, e))?;
            if is_stdout(&m) {
                return Ok(Destination::Stdout);
            }
            if m.is_dir() {
                return Err(write_error(path, "it is a directory"));
            }
            return Ok(Destination::InPlace { path: p });
        }
        match fs::symlink_metadata(&p) {
            Err(e) if e.kind() == io::ErrorKind::NotFound => {
                let dir = parent(&p);
                return match fs::metadata(&dir) {
                    Ok(m) if m.is_dir() => Ok(Destination::File { target: p }),
                    Ok(_) => Err(write_error(path, format!("{} is not a directory", dir.display()))),
                    Err(e) => Err(write_error(path, format!("{}: {e}", dir.display()))),
                };
            }
            Err(e) => return Err(write_error(path, e)),
            Ok(m) if m.file_type().is_symlink() => {
                let link = fs::read_link(&p).map_err(|e| write_error(path, e))?;
                p = if link.is_absolute() { link } else { parent(&p).join(link) };
            }
            Ok(m) if m.is_file() => return Ok(Destination::File { target: p }),
            Ok(m) if m.is_dir() => return Err(write_error(path, "it is a directory")),
            Ok(_) => return Ok(Destination::InPlace { path: p }),
        }
    }
    Err(write_error(path, format!("more than {MAX_LINKS} symbolic links")))
}

/// The directory a file is created in: its parent, or `.` for a bare name.
fn parent(p: &Path) -> PathBuf {
    match p.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

enum Sink {
    /// Not written yet.
    Empty,
    /// A regular file staged beside its target.
    Staged(tempfile::NamedTempFile),
    /// Bytes for standard output or an in-place destination.
    Held(Vec<u8>),
}

struct Entry {
    option: String,
    label: String,
    shown: PathBuf,
    destination: Destination,
    sink: Sink,
    /// Flushed to the disk before the rename ([`Outputs::durable`]).
    durable: bool,
}

/// One output that was written, for the "written to" lines.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Written {
    /// What it is, e.g. `chart`.
    pub label: String,
    /// The path as the user gave it.
    pub path: PathBuf,
    /// Whether it went to standard output.
    pub to_stdout: bool,
}

/// A command's outputs, committed together.
#[derive(Default)]
pub struct Outputs {
    entries: Vec<Entry>,
}

impl Outputs {
    /// Resolves every requested output: `(option, label, path)`, e.g.
    /// `("--svg", "chart", path)`. Refuses two outputs on standard output or
    /// on one file, and destinations that cannot be files (a directory, a
    /// missing directory). Nothing is created yet.
    pub fn open<'a>(requests: impl IntoIterator<Item = (&'a str, &'a str, &'a Path)>) -> Result<Self, OutputError> {
        let mut entries: Vec<Entry> = Vec::new();
        for (option, label, path) in requests {
            let destination = destination(path)?;
            for e in &entries {
                match (&e.destination, &destination) {
                    (Destination::Stdout, Destination::Stdout) => {
                        return Err(OutputError::TwoStdout { first: e.option.clone(), second: option.to_string() })
                    }
                    (Destination::File { target: a }, Destination::File { target: b })
                    | (Destination::InPlace { path: a }, Destination::InPlace { path: b })
                        if same_path(a, b) =>
                    {
                        return Err(OutputError::SameFile {
                            first: e.option.clone(),
                            second: option.to_string(),
                            path: path.display().to_string(),
                        })
                    }
                    _ => {}
                }
            }
            entries.push(Entry {
                option: option.to_string(),
                label: label.to_string(),
                shown: path.to_path_buf(),
                destination,
                sink: Sink::Empty,
                durable: false,
            });
        }
        Ok(Outputs { entries })
    }

    /// Asks for `option`'s file to reach the disk before it replaces its
    /// destination (one `fsync` of the staged file): for an output that
    /// overwrites something the user keeps, such as a scenario rewritten
    /// in place, so that a crash right after the rename cannot leave it
    /// empty. Other outputs are only renamed into place: a reader still
    /// never sees half a file, and a failed command still leaves the old
    /// one, without a flush to the disk per file.
    pub fn durable(&mut self, option: &str) {
        for e in self.entries.iter_mut().filter(|e| e.option == option) {
            e.durable = true;
        }
    }

    /// Whether any output goes to standard output (a command then prints its
    /// text summary on standard error).
    pub fn to_stdout(&self) -> bool {
        self.entries.iter().any(|e| e.destination == Destination::Stdout)
    }

    /// Whether `option` was requested.
    pub fn wants(&self, option: &str) -> bool {
        self.entries.iter().any(|e| e.option == option)
    }

    /// The path `option` was given (as the user wrote it), if requested.
    pub fn path(&self, option: &str) -> Option<&Path> {
        self.entries.iter().find(|e| e.option == option).map(|e| e.shown.as_path())
    }

    /// Fills `option`'s output with what `fill` writes (nothing happens when
    /// it was not requested). Regular files are written to their staging
    /// file now; other destinations are held until [`Outputs::commit`].
    pub fn write_with(
        &mut self,
        option: &str,
        fill: impl FnOnce(&mut dyn Write) -> io::Result<()>,
    ) -> Result<(), OutputError> {
        let Some(e) = self.entries.iter_mut().find(|e| e.option == option) else { return Ok(()) };
        let shown = e.shown.clone();
        e.sink = match &e.destination {
            Destination::File { target } => {
                let dir = parent(target);
                let mut tmp = tempfile::Builder::new()
                    .prefix(".baton-")
                    .tempfile_in(&dir)
                    .map_err(|err| write_error(&shown, format!("cannot create a file in {}: {err}", dir.display())))?;
                {
                    let mut buf = io::BufWriter::new(tmp.as_file_mut());
                    fill(&mut buf).map_err(|err| write_error(&shown, err))?;
                    buf.flush().map_err(|err| write_error(&shown, err))?;
                }
                Sink::Staged(tmp)
            }
            Destination::Stdout | Destination::InPlace { .. } => {
                let mut bytes = Vec::new();
                fill(&mut bytes).map_err(|err| write_error(&shown, err))?;
                Sink::Held(bytes)
            }
        };
        Ok(())
    }

    /// [`Outputs::write_with`] for bytes already made.
    pub fn write(&mut self, option: &str, bytes: &[u8]) -> Result<(), OutputError> {
        self.write_with(option, |w| w.write_all(bytes))
    }

    /// Writes every filled output: staged files are flushed to disk, then
    /// standard output and in-place destinations are written, then the
    /// staged files replace their destinations. Outputs never filled are
    /// left alone. Returns what was written, in request order.
    pub fn commit(self) -> Result<Vec<Written>, OutputError> {
        for e in self.entries.iter().filter(|e| e.durable) {
            if let Sink::Staged(tmp) = &e.sink {
                tmp.as_file().sync_all().map_err(|err| write_error(&e.shown, err))?;
            }
        }
        for e in &self.entries {
            let Sink::Held(bytes) = &e.sink else { continue };
            match &e.destination {
                Destination::Stdout => {
                    let mut out = io::stdout().lock();
                    out.write_all(bytes)
                        .and_then(|()| out.flush())
                        .map_err(|err| write_error(Path::new("standard output"), err))?;
                }
                Destination::InPlace { path } => {
                    let mut f =
                        fs::OpenOptions::new().write(true).open(path).map_err(|err| write_error(&e.shown, err))?;
                    f.write_all(bytes).and_then(|()| f.flush()).map_err(|err| write_error(&e.shown, err))?;
                }
                Destination::File { .. } => {}
            }
        }
        let mut written = Vec::new();
        for e in self.entries {
            let to_stdout = e.destination == Destination::Stdout;
            match (e.sink, e.destination) {
                (Sink::Staged(tmp), Destination::File { target }) => {
                    set_mode(&tmp, &target);
                    tmp.persist(&target).map_err(|err| write_error(&e.shown, err.error))?;
                }
                (Sink::Empty, _) => continue,
                _ => {}
            }
            written.push(Written { label: e.label, path: e.shown, to_stdout });
        }
        Ok(written)
    }
}

/// Whether two destinations are one file (same path, or same file on disk).
fn same_path(a: &Path, b: &Path) -> bool {
    if a == b {
        return true;
    }
    match (fs::canonicalize(a), fs::canonicalize(b)) {
        (Ok(x), Ok(y)) => x == y,
        _ => match (fs::canonicalize(parent(a)), fs::canonicalize(parent(b))) {
            (Ok(x), Ok(y)) => x == y && a.file_name() == b.file_name(),
            _ => false,
        },
    }
}

/// A replaced file keeps its permissions; a new one is readable by all
/// (staging files are private).
fn set_mode(tmp: &tempfile::NamedTempFile, target: &Path) {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        let perms = fs::metadata(target).map(|m| m.permissions()).unwrap_or_else(|_| fs::Permissions::from_mode(0o644));
        let _ = tmp.as_file().set_permissions(perms);
    }
    #[cfg(not(unix))]
    {
        let _ = (tmp, target);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn classifies_destinations() {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("a.txt");
        assert_eq!(destination(Path::new("-")).unwrap(), Destination::Stdout);
        assert_eq!(destination(&file).unwrap(), Destination::File { target: file.clone() });
        fs::write(&file, "old").unwrap();
        assert_eq!(destination(&file).unwrap(), Destination::File { target: file.clone() });
        assert!(matches!(destination(dir.path()), Err(OutputError::Write { .. })));
        let missing = dir.path().join("no/such/dir/a.txt");
        let e = destination(&missing).unwrap_err();
        assert!(e.to_string().contains("No such file"), "{e}");
        assert_eq!(destination(Path::new("/dev/null")).unwrap(), Destination::InPlace { path: "/dev/null".into() });
    }

    #[cfg(unix)]
    #[test]
    fn follows_links_to_their_target() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("real.json");
        let link = dir.path().join("link.json");
        let chain = dir.path().join("chain.json");
        std::os::unix::fs::symlink("real.json", &link).unwrap();
        std::os::unix::fs::symlink(&link, &chain).unwrap();
        // A dangling link names the file to create.
        assert_eq!(destination(&link).unwrap(), Destination::File { target: dir.path().join("real.json") });
        fs::write(&target, "old").unwrap();
        assert_eq!(destination(&chain).unwrap(), Destination::File { target: dir.path().join("real.json") });
        let mut out = Outputs::open([("--json", "report", chain.as_path())]).unwrap();
        out.write("--json", b"new").unwrap();
        out.commit().unwrap();
        assert_eq!(fs::read_to_string(&target).unwrap(), "new");
        assert!(fs::symlink_metadata(&link).unwrap().file_type().is_symlink());
        assert!(fs::symlink_metadata(&chain).unwrap().file_type().is_symlink());
        // A loop is refused.
        let a = dir.path().join("loop-a");
        let b = dir.path().join("loop-b");
        std::os::unix::fs::symlink(&b, &a).unwrap();
        std::os::unix::fs::symlink(&a, &b).unwrap();
        assert!(destination(&a).unwrap_err().to_string().contains("symbolic links"));
    }

    #[test]
    fn refuses_two_outputs_on_stdout_or_one_file() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("x");
        let e =
            Outputs::open([("--json", "report", Path::new("-")), ("--svg", "chart", Path::new("-"))]).err().unwrap();
        assert!(e.is_usage());
        assert_eq!(e.to_string(), "--json and --svg both write to standard output; at most one output may use it");
        let e = Outputs::open([("--json", "report", f.as_path()), ("--svg", "chart", f.as_path())]).err().unwrap();
        assert!(e.is_usage() && e.to_string().starts_with("--json and --svg both write"), "{e}");
    }

    #[test]
    fn nothing_replaced_until_commit_and_unfilled_outputs_untouched() {
        let dir = tempfile::tempdir().unwrap();
        let (a, b) = (dir.path().join("a"), dir.path().join("b"));
        fs::write(&a, "old a").unwrap();
        fs::write(&b, "old b").unwrap();
        let mut out = Outputs::open([("--a", "A", a.as_path()), ("--b", "B", b.as_path())]).unwrap();
        out.write("--a", b"new a").unwrap();
        assert_eq!(fs::read_to_string(&a).unwrap(), "old a");
        let written = out.commit().unwrap();
        assert_eq!(fs::read_to_string(&a).unwrap(), "new a");
        assert_eq!(fs::read_to_string(&b).unwrap(), "old b");
        assert_eq!(written, vec![Written { label: "A".into(), path: a.clone(), to_stdout: false }]);
        // Dropped without commit: nothing changes and no staging file is left.
        let mut out = Outputs::open([("--a", "A", a.as_path())]).unwrap();
        out.write("--a", b"newer").unwrap();
        drop(out);
        assert_eq!(fs::read_to_string(&a).unwrap(), "new a");
        assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 2);
    }

    #[cfg(unix)]
    #[test]
    fn a_replaced_file_keeps_its_permissions() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().unwrap();
        let a = dir.path().join("a");
        fs::write(&a, "old").unwrap();
        fs::set_permissions(&a, fs::Permissions::from_mode(0o600)).unwrap();
        let mut out = Outputs::open([("--a", "A", a.as_path())]).unwrap();
        out.write("--a", b"new").unwrap();
        out.commit().unwrap();
        assert_eq!(fs::metadata(&a).unwrap().permissions().mode() & 0o777, 0o600);
        let fresh = dir.path().join("fresh");
        let mut out = Outputs::open([("--a", "A", fresh.as_path())]).unwrap();
        out.write("--a", b"x").unwrap();
        out.commit().unwrap();
        assert_eq!(fs::metadata(&fresh).unwrap().permissions().mode() & 0o777, 0o644);
    }
}
