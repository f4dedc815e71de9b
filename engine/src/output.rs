//! Output: every file is written to a temporary name and renamed into place, so an interrupted
//! or failed run never leaves a partial file behind; a command's files form one set
//! ([`OutputSet`]): staged, moved into place together, closed by a manifest of their SHA-256
//! hashes that readers check ([`check_manifest`]), under an exclusive lock of the folder.

use crate::error::{Error, Result};
use std::io::Write;
use std::path::{Path, PathBuf};

/// Create `dir` (and parents) if it does not exist.
pub fn ensure_dir(dir: &Path) -> Result<()> {
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))
}

/// Write `bytes` to `path` atomically (temporary sibling, fsync, rename).
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let dir = path.parent().filter(|p| !p.as_os_str().is_empty());
    if let Some(d) = dir {
        ensure_dir(d)?;
    }
    let tmp = temporary_name(path);
    let result = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if let Err(e) = result {
        let _ = std::fs::remove_file(&tmp);
        return Err(Error::io(path, e));
    }
    Ok(())
}

/// Write a value as pretty JSON (with a final newline), atomically.
pub fn write_json<T: serde::Serialize>(path: &Path, value: &T) -> Result<()> {
    let mut text = serde_json::to_string_pretty(value).map_err(|e| Error::NonFinite {
        what: format!("{} ({e})", path.display()),
    })?;
    text.push('\n');
    write_atomic(path, text.as_bytes())
}

fn temporary_name(path: &Path) -> PathBuf {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    path.with_file_name(format!(".{name}.{}.tmp", std::process::id()))
}

/// Format a float so that it reads back to the same f64 (shortest round-trip form).
pub fn fmt_f64(x: f64) -> String {
    format!("{x:?}")
}

/// A CSV table from rows of a plain struct type (`T`'s fields are its columns, in order), with
/// every `f64` in the round-trip form of [`fmt_f64`] (csv's own float form differs for some
/// magnitudes), integers and strings as they are, `None` as an empty cell. The header is
/// written even when there are no rows. This is the one writer of the engine's tables whose
/// floats must read back bit for bit; [`read_csv`] reads them with the same `T`.
pub fn csv_table<T: serde::Serialize + serde::de::DeserializeOwned>(
    rows: &[T],
    what: &str,
) -> Result<Vec<u8>> {
    let bad = |e: String| Error::NonFinite {
        what: format!("{what} ({e})"),
    };
    let mut w = csv::Writer::from_writer(Vec::new());
    w.write_record(csv_columns::<T>())
        .map_err(|e| bad(e.to_string()))?;
    let mut cells = Vec::new();
    for r in rows {
        cells.clear();
        r.serialize(round_trip::Row(&mut cells))
            .map_err(|e| bad(e.to_string()))?;
        w.write_record(&cells).map_err(|e| bad(e.to_string()))?;
    }
    w.into_inner().map_err(|e| bad(e.to_string()))
}

/// The serializer behind [`csv_table`]: a struct of scalars becomes one text cell per field.
mod round_trip {
    use serde::ser::{Error as _, Impossible, Serialize, SerializeStruct, Serializer};
    type E = serde::de::value::Error;

    /// A row: a struct whose fields are scalars (or options of scalars).
    pub(super) struct Row<'a>(pub(super) &'a mut Vec<String>);

    /// One cell.
    struct Cell;

    fn not_a_cell<T>(what: &str) -> Result<T, E> {
        Err(E::custom(format!("a CSV cell cannot hold {what}")))
    }

    /// The compound forms (and enums with data) neither a row nor a cell can be.
    macro_rules! no_compounds {
        () => {
            fn serialize_seq(self, _: Option<usize>) -> Result<Self::SerializeSeq, E> {
                not_a_cell("a sequence")
            }
            fn serialize_tuple(self, _: usize) -> Result<Self::SerializeTuple, E> {
                not_a_cell("a tuple")
            }
            fn serialize_tuple_struct(
                self,
                _: &'static str,
                _: usize,
            ) -> Result<Self::SerializeTupleStruct, E> {
                not_a_cell("a tuple")
            }
            fn serialize_tuple_variant(
                self,
                _: &'static str,
                _: u32,
                _: &'static str,
                _: usize,
            ) -> Result<Self::SerializeTupleVariant, E> {
                not_a_cell("an enum")
            }
            fn serialize_newtype_variant<T: ?Sized + Serialize>(
                self,
                _: &'static str,
                _: u32,
                _: &'static str,
                _: &T,
            ) -> Result<Self::Ok, E> {
                not_a_cell("an enum with data")
            }
            fn serialize_map(self, _: Option<usize>) -> Result<Self::SerializeMap, E> {
                not_a_cell("a map")
            }
            fn serialize_struct_variant(
                self,
                _: &'static str,
                _: u32,
                _: &'static str,
                _: usize,
            ) -> Result<Self::SerializeStructVariant, E> {
                not_a_cell("an enum")
            }
        };
    }

    impl SerializeStruct for Row<'_> {
        type Ok = ();
        type Error = E;
        fn serialize_field<T: ?Sized + Serialize>(
            &mut self,
            _: &'static str,
            value: &T,
        ) -> Result<(), E> {
            self.0.push(value.serialize(Cell)?);
            Ok(())
        }
        fn end(self) -> Result<(), E> {
            Ok(())
        }
    }

    /// Calls `$m!` with the serializer methods of the scalars a cell holds in their `Display`
    /// form (a row refuses them; floats have a form of their own).
    macro_rules! text_scalars {
        ($m:ident) => {
            $m!(
                serialize_bool(bool),
                serialize_i8(i8),
                serialize_i16(i16),
                serialize_i32(i32),
                serialize_i64(i64),
                serialize_u8(u8),
                serialize_u16(u16),
                serialize_u32(u32),
                serialize_u64(u64),
                serialize_char(char),
                serialize_str(&str)
            );
        };
    }

    macro_rules! refuse {
        ($($f:ident($t:ty)),*) => {$(
            fn $f(self, _: $t) -> Result<Self::Ok, E> { not_a_cell(stringify!($t)) }
        )*};
    }

    impl<'a> Serializer for Row<'a> {
        type Ok = ();
        type Error = E;
        type SerializeSeq = Impossible<(), E>;
        type SerializeTuple = Impossible<(), E>;
        type SerializeTupleStruct = Impossible<(), E>;
        type SerializeTupleVariant = Impossible<(), E>;
        type SerializeMap = Impossible<(), E>;
        type SerializeStruct = Row<'a>;
        type SerializeStructVariant = Impossible<(), E>;
        fn serialize_struct(self, _: &'static str, _: usize) -> Result<Row<'a>, E> {
            Ok(self)
        }
        text_scalars!(refuse);
        refuse!(
            serialize_f32(f32),
            serialize_f64(f64),
            serialize_bytes(&[u8]),
            serialize_unit_struct(&'static str)
        );
        fn serialize_none(self) -> Result<(), E> {
            not_a_cell("a lone None")
        }
        fn serialize_some<T: ?Sized + Serialize>(self, _: &T) -> Result<(), E> {
            not_a_cell("a lone Some")
        }
        fn serialize_unit(self) -> Result<(), E> {
            not_a_cell("()")
        }
        fn serialize_unit_variant(self, _: &'static str, _: u32, _: &'static str) -> Result<(), E> {
            not_a_cell("an enum")
        }
        fn serialize_newtype_struct<T: ?Sized + Serialize>(
            self,
            _: &'static str,
            _: &T,
        ) -> Result<(), E> {
            not_a_cell("a newtype")
        }
        no_compounds!();
    }

    macro_rules! display {
        ($($f:ident($t:ty)),*) => {$(
            fn $f(self, v: $t) -> Result<String, E> { Ok(v.to_string()) }
        )*};
    }

    impl Serializer for Cell {
        type Ok = String;
        type Error = E;
        type SerializeSeq = Impossible<String, E>;
        type SerializeTuple = Impossible<String, E>;
        type SerializeTupleStruct = Impossible<String, E>;
        type SerializeTupleVariant = Impossible<String, E>;
        type SerializeMap = Impossible<String, E>;
        type SerializeStruct = Impossible<String, E>;
        type SerializeStructVariant = Impossible<String, E>;
        text_scalars!(display);
        fn serialize_f32(self, v: f32) -> Result<String, E> {
            Ok(super::fmt_f64(v as f64))
        }
        fn serialize_f64(self, v: f64) -> Result<String, E> {
            Ok(super::fmt_f64(v))
        }
        fn serialize_bytes(self, _: &[u8]) -> Result<String, E> {
            not_a_cell("bytes")
        }
        fn serialize_none(self) -> Result<String, E> {
            Ok(String::new())
        }
        fn serialize_some<T: ?Sized + Serialize>(self, v: &T) -> Result<String, E> {
            v.serialize(self)
        }
        fn serialize_unit(self) -> Result<String, E> {
            Ok(String::new())
        }
        fn serialize_unit_struct(self, _: &'static str) -> Result<String, E> {
            Ok(String::new())
        }
        fn serialize_unit_variant(
            self,
            _: &'static str,
            _: u32,
            name: &'static str,
        ) -> Result<String, E> {
            Ok(name.to_string())
        }
        fn serialize_newtype_struct<T: ?Sized + Serialize>(
            self,
            _: &'static str,
            v: &T,
        ) -> Result<String, E> {
            v.serialize(self)
        }
        no_compounds!();
        fn serialize_struct(self, _: &'static str, _: usize) -> Result<Self::SerializeStruct, E> {
            not_a_cell("a nested struct")
        }
    }
}

/// The column names of a CSV row type: its serde field names, in order (a plain struct
/// deriving `Deserialize`; empty for anything else).
pub fn csv_columns<T: serde::de::DeserializeOwned>() -> &'static [&'static str] {
    use serde::de::{Error as _, Visitor};
    struct Names<'a>(&'a mut &'static [&'static str]);
    impl<'de> serde::Deserializer<'de> for Names<'_> {
        type Error = serde::de::value::Error;
        fn deserialize_any<V: Visitor<'de>>(
            self,
            _: V,
        ) -> std::result::Result<V::Value, Self::Error> {
            Err(Self::Error::custom("not a struct"))
        }
        fn deserialize_struct<V: Visitor<'de>>(
            self,
            _: &'static str,
            fields: &'static [&'static str],
            _: V,
        ) -> std::result::Result<V::Value, Self::Error> {
            *self.0 = fields;
            Err(Self::Error::custom("only the field names were wanted"))
        }
        serde::forward_to_deserialize_any! {
            bool i8 i16 i32 i64 i128 u8 u16 u32 u64 u128 f32 f64 char str string bytes byte_buf
            option unit unit_struct newtype_struct seq tuple tuple_struct map enum identifier
            ignored_any
        }
    }
    let mut fields: &'static [&'static str] = &[];
    let _ = T::deserialize(Names(&mut fields));
    fields
}

/// Read a CSV table with the row type it was written with (`T`): every column of `T` must be
/// in the header (others are ignored), cells are trimmed, a line repeating the header (files
/// of shards concatenated) is skipped, and a bad cell is an
/// [`Error::Input`] naming the file, the line and the column. Rows come with their line.
pub fn read_csv<T: serde::de::DeserializeOwned>(path: &Path) -> Result<Vec<(usize, T)>> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    parse_csv(&bytes, path)
}

/// [`read_csv`] of bytes already read from `path` (named in the errors).
pub fn parse_csv<T: serde::de::DeserializeOwned>(
    bytes: &[u8],
    path: &Path,
) -> Result<Vec<(usize, T)>> {
    let mut rdr = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .from_reader(bytes);
    let bad = |e: csv::Error, header: &csv::StringRecord| {
        let line = e.position().map(|p| p.line() as usize);
        match e.kind() {
            csv::ErrorKind::Deserialize { err, .. } => {
                let column = err.field().and_then(|i| header.get(i as usize));
                Error::input(path, line, column, err.kind().to_string())
            }
            _ => Error::input(path, line, None, e.to_string()),
        }
    };
    let header = rdr
        .headers()
        .map_err(|e| bad(e, &csv::StringRecord::new()))?
        .clone();
    for column in csv_columns::<T>() {
        if !header.iter().any(|h| h == *column) {
            return Err(Error::input(
                path,
                Some(1),
                Some(column),
                "the column is missing from the header",
            ));
        }
    }
    let mut rows = Vec::new();
    for rec in rdr.records() {
        let rec = rec.map_err(|e| bad(e, &header))?;
        if rec == header {
            continue; // the files of shards concatenated repeat the header
        }
        let line = rec.position().map_or(0, |p| p.line() as usize);
        let row = rec
            .deserialize(Some(&header))
            .map_err(|e| bad(e, &header))?;
        rows.push((line, row));
    }
    Ok(rows)
}

/// Read a JSON file with the type it was written with; a bad file is an [`Error::Input`]
/// naming the file, the line and serde's account of the field.
pub fn read_json<T: serde::de::DeserializeOwned>(path: &Path) -> Result<T> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    serde_json::from_str(&text).map_err(|e| Error::input(path, Some(e.line()), None, e.to_string()))
}

/// The name of the manifest that closes an output set.
pub const MANIFEST_FILE: &str = "manifest.json";

/// The name of the lock file held while a run writes into a folder.
pub const LOCK_FILE: &str = ".lock";

/// One file of an output set.
#[derive(Clone, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ManifestEntry {
    /// Path relative to the folder (`/`-separated, no `..`).
    pub name: String,
    pub bytes: u64,
    /// Lower-case hex SHA-256 of the file's bytes.
    pub sha256: String,
}

/// The manifest of an output folder: every file the run wrote, with its hash. It is written
/// last, so a folder whose manifest is missing or disagrees with its files was interrupted,
/// mixed with another run's files or edited afterwards.
#[derive(Clone, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    /// What wrote the folder (`correlate`, `null`, `merge`, `inject`, ...).
    pub command: String,
    pub program: String,
    pub version: String,
    pub files: Vec<ManifestEntry>,
}

impl Manifest {
    /// Whether the set holds a file of this name.
    pub fn has(&self, name: &str) -> bool {
        self.files.iter().any(|f| f.name == name)
    }
}

fn sha256_hex(bytes: &[u8]) -> String {
    use sha2::{Digest, Sha256};
    Sha256::digest(bytes)
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

/// Check that `name` is a plain relative path that stays inside its folder: non-empty parts of
/// letters, digits, `.`, `_`, `-`, `+`, none of them `.` or `..`, separated by `/`.
pub fn check_relative_name(name: &str) -> std::result::Result<(), String> {
    if name.is_empty() || name.len() > 255 {
        return Err(format!(
            "{} is not a usable file name (1 to 255 characters)",
            quote(name)
        ));
    }
    for part in name.split('/') {
        if part.is_empty() || part == "." || part == ".." {
            return Err(format!(
                "{} leaves its folder or has an empty part; give a relative path inside the folder",
                quote(name)
            ));
        }
        if !part
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '-' | '+'))
        {
            return Err(format!(
                "{} may hold only letters, digits, '.', '_', '-', '+' and '/'",
                quote(name)
            ));
        }
    }
    Ok(())
}

/// Check that the files of an output folder form one set: `manifest.json` exists and every
/// file it lists is present with the recorded size and SHA-256. Readers of output folders call
/// this before reading anything, so a folder whose files come from different runs is refused.
pub fn check_manifest(dir: &Path) -> Result<Manifest> {
    let path = dir.join(MANIFEST_FILE);
    let text = match std::fs::read(&path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(Error::input(
                &path,
                None,
                None,
                "is missing, so the folder is not one complete ptacorr output (an interrupted run, files of several runs, or an older version); rerun the command that made it",
            ))
        }
        Err(e) => return Err(Error::io(&path, e)),
    };
    let text = std::str::from_utf8(&text)
        .map_err(|e| Error::input(&path, None, None, non_utf8_message(&text, &e)))?;
    let manifest: Manifest = serde_json::from_str(text)
        .map_err(|e| Error::input(&path, Some(e.line()), None, truncate(&e.to_string(), 200)))?;
    for (i, f) in manifest.files.iter().enumerate() {
        check_relative_name(&f.name)
            .map_err(|m| Error::input(&path, None, Some(&format!("files[{i}].name")), m))?;
        let p = dir.join(&f.name);
        let bytes = std::fs::read(&p).map_err(|e| Error::io(&p, e))?;
        if bytes.len() as u64 != f.bytes || sha256_hex(&bytes) != f.sha256 {
            return Err(Error::input(
                &p,
                None,
                None,
                format!(
                    "does not match {} (size or SHA-256 differs): the folder mixes files of different runs or was edited; rerun the command that made it",
                    path.display()
                ),
            ));
        }
    }
    Ok(manifest)
}

/// An exclusive OS lock (`flock`) on `dir/.lock`, held while a run writes into `dir` and
/// released when dropped or when the process ends in any way (even SIGKILL).
#[derive(Debug)]
pub struct DirLock {
    _file: std::fs::File,
    path: PathBuf,
}

impl DirLock {
    /// Lock `dir` (created if needed), or refuse when another run holds it.
    pub fn acquire(dir: &Path) -> Result<DirLock> {
        use std::os::unix::io::AsRawFd;
        ensure_dir(dir)?;
        let path = dir.join(LOCK_FILE);
        let mut file = std::fs::OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(|e| Error::io(&path, e))?;
        // SAFETY: flock on a file descriptor we own; no memory is shared.
        let rc = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
        if rc != 0 {
            let err = std::io::Error::last_os_error();
            if err.raw_os_error() == Some(libc::EWOULDBLOCK) {
                let mut holder = String::new();
                let _ = std::io::Read::read_to_string(&mut file, &mut holder);
                let holder = holder.trim();
                return Err(Error::setting(
                    "out",
                    format!(
                        "{} is in use by another ptacorr run{}; wait for it to finish or choose another output folder",
                        dir.display(),
                        if holder.is_empty() { String::new() } else { format!(" (process {})", truncate(holder, 20)) }
                    ),
                ));
            }
            return Err(Error::io(&path, err));
        }
        let _ = file.set_len(0);
        let _ = writeln!(file, "{}", std::process::id());
        Ok(DirLock { _file: file, path })
    }

    /// The lock file.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

/// The files of one command's output, written into a hidden staging folder inside the output
/// folder and moved into place only by [`OutputSet::commit`], with `manifest.json` last. While
/// the set is open the output folder is locked ([`DirLock`]); a set dropped without commit
/// (an error, an interruption) removes its staging folder and leaves the earlier output as it
/// was.
#[derive(Debug)]
pub struct OutputSet {
    dir: PathBuf,
    staging: PathBuf,
    command: String,
    files: Vec<ManifestEntry>,
    committed: bool,
    /// The folder did not exist before: a failed run removes it again if nothing else is there.
    created: bool,
    _lock: DirLock,
}

const STAGING_PREFIX: &str = ".staging-";

impl OutputSet {
    /// Open an output set for `command` in `dir` (created if needed): lock the folder, clear
    /// staging folders left by killed runs, create a fresh one.
    pub fn begin(dir: &Path, command: &str) -> Result<OutputSet> {
        let created = !dir.exists();
        let lock = DirLock::acquire(dir)?;
        // With the lock held no other run is writing here, so leftovers are stale.
        if let Ok(entries) = std::fs::read_dir(dir) {
            for e in entries.flatten() {
                let name = e.file_name().to_string_lossy().into_owned();
                if name.starts_with(STAGING_PREFIX) {
                    let _ = std::fs::remove_dir_all(e.path());
                } else if name.starts_with('.') && name.ends_with(".tmp") {
                    let _ = std::fs::remove_file(e.path());
                }
            }
        }
        let staging = dir.join(format!("{STAGING_PREFIX}{}", std::process::id()));
        std::fs::create_dir(&staging).map_err(|e| Error::io(&staging, e))?;
        Ok(OutputSet {
            dir: dir.to_path_buf(),
            staging,
            command: command.to_string(),
            files: Vec::new(),
            committed: false,
            created,
            _lock: lock,
        })
    }

    /// The output folder.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Stage one file of the set (`name` relative to the folder).
    pub fn write(&mut self, name: &str, bytes: &[u8]) -> Result<()> {
        check_relative_name(name).map_err(|m| Error::setting("output file", m))?;
        if name == MANIFEST_FILE || self.files.iter().any(|f| f.name == name) {
            return Err(Error::setting(
                "output file",
                format!("{name} is written twice or is reserved"),
            ));
        }
        let path = self.staging.join(name);
        if let Some(parent) = path.parent() {
            ensure_dir(parent)?;
        }
        let result = (|| -> std::io::Result<()> {
            let mut f = std::fs::File::create(&path)?;
            f.write_all(bytes)?;
            f.sync_all()
        })();
        result.map_err(|e| Error::io(&self.dir.join(name), e))?;
        self.files.push(ManifestEntry {
            name: name.to_string(),
            bytes: bytes.len() as u64,
            sha256: sha256_hex(bytes),
        });
        Ok(())
    }

    /// Stage a value as pretty JSON (with a final newline).
    pub fn write_json<T: serde::Serialize>(&mut self, name: &str, value: &T) -> Result<()> {
        let mut text = serde_json::to_string_pretty(value).map_err(|e| Error::NonFinite {
            what: format!("{} ({e})", self.dir.join(name).display()),
        })?;
        text.push('\n');
        self.write(name, text.as_bytes())
    }

    /// Move the staged files into the folder and write the manifest last. The old manifest is
    /// removed first, so a crash part-way leaves a folder every reader refuses rather than a
    /// mixed one; files of the old set that the new set does not have are removed.
    pub fn commit(mut self) -> Result<Manifest> {
        let manifest = Manifest {
            command: self.command.clone(),
            program: "ptacorr".to_string(),
            version: crate::VERSION.to_string(),
            files: self.files.clone(),
        };
        let mut text = serde_json::to_string_pretty(&manifest).map_err(|e| Error::NonFinite {
            what: format!("{MANIFEST_FILE} ({e})"),
        })?;
        text.push('\n');
        let staged_manifest = self.staging.join(MANIFEST_FILE);
        std::fs::write(&staged_manifest, text.as_bytes())
            .and_then(|_| std::fs::File::open(&staged_manifest)?.sync_all())
            .map_err(|e| Error::io(&self.dir.join(MANIFEST_FILE), e))?;
        let old = self.dir.join(MANIFEST_FILE);
        let previous: Option<Manifest> = std::fs::read_to_string(&old)
            .ok()
            .and_then(|t| serde_json::from_str(&t).ok());
        match std::fs::remove_file(&old) {
            Ok(()) => {}
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
            Err(e) => return Err(Error::io(&old, e)),
        }
        if let Some(p) = previous {
            for f in p.files {
                if !self.has(&f.name) && check_relative_name(&f.name).is_ok() {
                    let _ = std::fs::remove_file(self.dir.join(&f.name));
                }
            }
        }
        for f in &self.files {
            let to = self.dir.join(&f.name);
            if let Some(parent) = to.parent() {
                ensure_dir(parent)?;
            }
            std::fs::rename(self.staging.join(&f.name), &to).map_err(|e| Error::io(&to, e))?;
        }
        std::fs::rename(&staged_manifest, &old).map_err(|e| Error::io(&old, e))?;
        sync_dir(&self.dir);
        let _ = std::fs::remove_dir_all(&self.staging);
        self.committed = true;
        Ok(manifest)
    }

    fn has(&self, name: &str) -> bool {
        self.files.iter().any(|f| f.name == name)
    }
}

impl Drop for OutputSet {
    fn drop(&mut self) {
        if !self.committed {
            let _ = std::fs::remove_dir_all(&self.staging);
            if self.created {
                let only_lock = std::fs::read_dir(&self.dir)
                    .is_ok_and(|mut it| it.all(|e| e.is_ok_and(|e| e.file_name() == LOCK_FILE)));
                if only_lock {
                    let _ = std::fs::remove_file(self._lock.path());
                    let _ = std::fs::remove_dir(&self.dir);
                }
            }
        }
    }
}

fn sync_dir(dir: &Path) {
    if let Ok(f) = std::fs::File::open(dir) {
        let _ = f.sync_all();
    }
}

/// Check that `dir` may receive a new release: absent, empty, or (with `replace`) a release.
pub fn check_release_target(dir: &Path, replace: bool) -> Result<()> {
    if !dir.exists() {
        return Ok(());
    }
    if !dir.is_dir() {
        return Err(Error::setting(
            "out",
            format!("{} exists and is not a folder", dir.display()),
        ));
    }
    let empty = std::fs::read_dir(dir)
        .map_err(|e| Error::io(dir, e))?
        .next()
        .is_none();
    if empty {
        return Ok(());
    }
    if !dir.join("release.toml").is_file() {
        return Err(Error::setting(
            "out",
            format!(
                "{} is not empty and holds no release; choose an empty or new folder",
                dir.display()
            ),
        ));
    }
    if !replace {
        return Err(Error::setting(
            "out",
            format!(
                "{} already holds a release; pass --replace-release to replace it as a whole, or choose another folder",
                dir.display()
            ),
        ));
    }
    Ok(())
}

/// A hidden folder beside a target folder (`.NAME.staging-PID`), removed when dropped unless
/// moved into place by [`SiblingStaging::replace`].
#[derive(Debug)]
pub struct SiblingStaging {
    path: PathBuf,
    done: bool,
}

impl SiblingStaging {
    /// Create the staging folder beside `target` (the parent is created if needed).
    pub fn new(target: &Path) -> Result<SiblingStaging> {
        let (parent, name) = split_target(target)?;
        ensure_dir(&parent)?;
        let path = parent.join(format!(".{name}.staging-{}", std::process::id()));
        if path.exists() {
            std::fs::remove_dir_all(&path).map_err(|e| Error::io(&path, e))?;
        }
        std::fs::create_dir(&path).map_err(|e| Error::io(&path, e))?;
        Ok(SiblingStaging { path, done: false })
    }

    /// The staging folder.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Move the staged folder to `target`, replacing what is there (checked again with
    /// [`check_release_target`]); the old folder is moved aside first and removed last.
    pub fn replace(mut self, target: &Path, replace: bool) -> Result<()> {
        check_release_target(target, replace)?;
        let (parent, name) = split_target(target)?;
        let aside = parent.join(format!(".{name}.old-{}", std::process::id()));
        let had_old = target.exists();
        if had_old {
            if aside.exists() {
                std::fs::remove_dir_all(&aside).map_err(|e| Error::io(&aside, e))?;
            }
            std::fs::rename(target, &aside).map_err(|e| Error::io(target, e))?;
        }
        if let Err(e) = std::fs::rename(&self.path, target) {
            if had_old {
                let _ = std::fs::rename(&aside, target);
            }
            return Err(Error::io(target, e));
        }
        self.done = true;
        sync_dir(&parent);
        if had_old {
            let _ = std::fs::remove_dir_all(&aside);
        }
        Ok(())
    }
}

impl Drop for SiblingStaging {
    fn drop(&mut self) {
        if !self.done {
            let _ = std::fs::remove_dir_all(&self.path);
        }
    }
}

fn split_target(target: &Path) -> Result<(PathBuf, String)> {
    let name = target
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .ok_or_else(|| {
            Error::setting(
                "out",
                format!("{} does not name a folder", target.display()),
            )
        })?;
    let parent = target
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."))
        .to_path_buf();
    Ok((parent, name))
}

/// At most `max` characters of `text`, with `...` and the full length when cut (for messages
/// that quote input: a 200 MB line is never echoed whole).
pub fn truncate(text: &str, max: usize) -> String {
    let n = text.chars().count();
    if n <= max {
        return text.to_string();
    }
    let head: String = text.chars().take(max).collect();
    format!("{head}... ({n} characters)")
}

/// `text` in double quotes, cut to about 80 characters (control characters escaped).
pub fn quote(text: &str) -> String {
    let cut = truncate(text, QUOTE_CHARS);
    format!("{cut:?}")
}

/// How many characters of offending input an error message quotes.
pub const QUOTE_CHARS: usize = 80;

/// A message for bytes that are not UTF-8: where the first bad byte is.
pub fn non_utf8_message(bytes: &[u8], e: &std::str::Utf8Error) -> String {
    let at = e.valid_up_to();
    let line = bytes[..at].iter().filter(|&&b| b == b'\n').count() + 1;
    format!(
        "is not UTF-8 text: byte 0x{:02x} at offset {at} (line {line}) is not valid UTF-8; save the file as UTF-8",
        bytes.get(at).copied().unwrap_or(0)
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Debug, PartialEq, serde::Serialize, serde::Deserialize)]
    struct Row {
        label: String,
        n: u64,
        x: f64,
        y: Option<f64>,
    }

    /// csv_table writes floats as Rust's `{:?}` (the standard library's documented shortest
    /// round-trip form), not csv's own form, which differs for 1e-5 <= |x| < 1e-4 (`0.00001`
    /// against `1e-5`); read_csv reads every value back bit for bit and names a bad cell's line
    /// and column.
    #[test]
    fn csv_tables_round_trip_in_the_debug_float_form() {
        let rows = vec![
            Row {
                label: "P01".into(),
                n: 3,
                x: 1e-5,
                y: None,
            },
            Row {
                label: "P02".into(),
                n: 0,
                x: -0.1 - 0.2,
                y: Some(1.0),
            },
            Row {
                label: "P03".into(),
                n: 7,
                x: 1e16,
                y: Some(f64::MIN_POSITIVE),
            },
        ];
        let bytes = csv_table(&rows, "test").unwrap();
        let text = String::from_utf8(bytes).unwrap();
        assert_eq!(
            text,
            "label,n,x,y\nP01,3,1e-5,\nP02,0,-0.30000000000000004,1.0\nP03,7,1e16,2.2250738585072014e-308\n"
        );
        assert_eq!(csv_table::<Row>(&[], "test").unwrap(), b"label,n,x,y\n");
        let dir = crate::testing::temp_dir("csv-table");
        let path = dir.join("t.csv");
        std::fs::write(&path, &text).unwrap();
        let back: Vec<Row> = read_csv(&path)
            .unwrap()
            .into_iter()
            .map(|(_, r)| r)
            .collect();
        assert_eq!(back, rows);
        std::fs::write(&path, text.replace("1e16", "ten")).unwrap();
        match read_csv::<Row>(&path).unwrap_err() {
            Error::Input { line, field, .. } => {
                assert_eq!(line, Some(4));
                assert_eq!(field.as_deref(), Some("x"));
            }
            e => panic!("unexpected {e}"),
        }
        std::fs::write(&path, "label,n,y\nP01,3,\n").unwrap();
        match read_csv::<Row>(&path).unwrap_err() {
            Error::Input { line, field, .. } => {
                assert_eq!(line, Some(1));
                assert_eq!(field.as_deref(), Some("x"));
            }
            e => panic!("unexpected {e}"),
        }
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn atomic_write_leaves_only_the_final_file() {
        let dir = crate::testing::temp_dir("output");
        let path = dir.join("a.txt");
        write_atomic(&path, b"hello").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"hello");
        let names: Vec<_> = std::fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names.len(), 1, "temporary file left behind: {names:?}");
        std::fs::remove_dir_all(&dir).unwrap();
    }

    fn scratch(name: &str) -> PathBuf {
        crate::testing::temp_path(&format!("set-{name}"))
    }

    fn names(dir: &Path) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }

    #[test]
    fn a_set_appears_whole_with_its_manifest_and_is_checked() {
        let d = scratch("whole");
        let mut set = OutputSet::begin(&d, "test").unwrap();
        set.write("a.csv", b"1\n").unwrap();
        set.write_json("b.json", &serde_json::json!({"x": 1}))
            .unwrap();
        // Nothing is in place before the commit.
        assert!(!d.join("a.csv").exists());
        let m = set.commit().unwrap();
        assert_eq!(m.files.len(), 2);
        assert_eq!(names(&d), [".lock", "a.csv", "b.json", "manifest.json"]);
        // SHA-256 of "1\n", computed independently (coreutils `printf '1\n' | sha256sum`).
        assert_eq!(
            m.files[0].sha256,
            "4355a46b19d348dc2f57c046f8ef63d4538ebb936000f3c9ee954a27460dd865"
        );
        assert_eq!(check_manifest(&d).unwrap(), m);
        // A file of another run beside the set is refused by the reader.
        std::fs::write(d.join("a.csv"), b"2\n").unwrap();
        let e = check_manifest(&d).unwrap_err().to_string();
        assert!(e.contains("a.csv") && e.contains("different runs"), "{e}");
        std::fs::remove_dir_all(&d).unwrap();
    }

    #[test]
    fn a_failed_set_leaves_the_earlier_output_and_no_stray_files() {
        let d = scratch("failed");
        let mut set = OutputSet::begin(&d, "test").unwrap();
        set.write("a.csv", b"old\n").unwrap();
        set.write("gone.csv", b"x\n").unwrap();
        set.commit().unwrap();
        let before: Vec<_> = names(&d)
            .into_iter()
            .map(|n| (n.clone(), std::fs::read(d.join(&n)).unwrap()))
            .collect();
        {
            let mut set = OutputSet::begin(&d, "test").unwrap();
            set.write("a.csv", b"new\n").unwrap();
            // A file name that cannot be written (escapes the folder) fails the set.
            assert!(set.write("../x.csv", b"x").is_err());
            // Dropped without commit.
        }
        let after: Vec<_> = names(&d)
            .into_iter()
            .map(|n| (n.clone(), std::fs::read(d.join(&n)).unwrap()))
            .collect();
        assert_eq!(before, after);
        check_manifest(&d).unwrap();
        // A later set without gone.csv removes it.
        let mut set = OutputSet::begin(&d, "test").unwrap();
        set.write("a.csv", b"new\n").unwrap();
        set.commit().unwrap();
        assert_eq!(names(&d), [".lock", "a.csv", "manifest.json"]);
        std::fs::remove_dir_all(&d).unwrap();
    }

    #[test]
    fn a_failed_first_run_leaves_no_folder() {
        let d = scratch("first");
        drop(OutputSet::begin(&d, "test").unwrap());
        assert!(!d.exists());
    }

    #[test]
    fn a_second_run_on_a_locked_folder_is_refused() {
        let d = scratch("lock");
        let set = OutputSet::begin(&d, "test").unwrap();
        let e = OutputSet::begin(&d, "test").unwrap_err().to_string();
        assert!(e.contains("in use by another ptacorr run"), "{e}");
        drop(set);
        OutputSet::begin(&d, "test").unwrap().commit().unwrap();
        std::fs::remove_dir_all(&d).unwrap();
    }

    #[test]
    fn a_folder_without_manifest_is_refused() {
        let d = scratch("nomanifest");
        std::fs::create_dir_all(&d).unwrap();
        let e = check_manifest(&d).unwrap_err().to_string();
        assert!(e.contains("manifest.json") && e.contains("missing"), "{e}");
        std::fs::remove_dir_all(&d).unwrap();
    }

    #[test]
    fn names_stay_inside_and_quotes_stay_short() {
        for bad in ["", "../a", "/etc/x", "a//b", "a/./b", "a b", "a\0"] {
            assert!(check_relative_name(bad).is_err(), "{bad:?}");
        }
        check_relative_name("residuals/P01.csv").unwrap();
        let long = "x".repeat(100_000);
        assert!(quote(&long).len() < 120);
        assert_eq!(quote("abc"), "\"abc\"");
    }

    #[test]
    fn a_release_is_replaced_only_when_asked() {
        let parent = scratch("release");
        let target = parent.join("rel");
        std::fs::create_dir_all(&target).unwrap();
        std::fs::write(target.join("release.toml"), b"old").unwrap();
        let e = check_release_target(&target, false)
            .unwrap_err()
            .to_string();
        assert!(e.contains("--replace-release"), "{e}");
        let st = SiblingStaging::new(&target).unwrap();
        std::fs::write(st.path().join("release.toml"), b"new").unwrap();
        st.replace(&target, true).unwrap();
        assert_eq!(std::fs::read(target.join("release.toml")).unwrap(), b"new");
        assert_eq!(names(&parent), ["rel"]);
        // A dropped staging folder leaves nothing.
        drop(SiblingStaging::new(&target).unwrap());
        assert_eq!(names(&parent), ["rel"]);
        std::fs::write(parent.join("other"), b"x").unwrap();
        std::fs::create_dir_all(parent.join("notrel")).unwrap();
        std::fs::write(parent.join("notrel/x"), b"x").unwrap();
        assert!(check_release_target(&parent.join("notrel"), true).is_err());
        std::fs::remove_dir_all(&parent).unwrap();
    }

    #[test]
    fn floats_round_trip() {
        for x in [1.0e-30, -0.1, 4.333333333333333, 12345.678] {
            assert_eq!(fmt_f64(x).parse::<f64>().unwrap(), x);
        }
    }

    /// The inline code spans of a Markdown page with their white space removed (a span may
    /// wrap over lines); fenced blocks are left out.
    fn code_spans(page: &str) -> Vec<String> {
        let text: String = page
            .lines()
            .filter(|l| !l.trim_start().starts_with("```"))
            .collect::<Vec<_>>()
            .join("\n");
        text.split('`')
            .skip(1)
            .step_by(2)
            .map(|s| s.split_whitespace().collect())
            .collect()
    }

    /// The column lists the user documentation gives (README.md and docs/, the published
    /// description of every table) are the row types' columns, which `csv_table` and the
    /// writers of the csv crate take the header from: a column renamed, added or moved in a
    /// row type without its documentation fails here. (No hand-written header constants: the
    /// header of every table is its row type's.)
    #[test]
    fn documented_columns_are_the_row_types() {
        fn columns<T: serde::de::DeserializeOwned>() -> String {
            csv_columns::<T>().join(",")
        }
        use crate::{
            analysis, bin_covariance, bins, common::write as common, hd_spread, inject, noise_fit,
            null, per_frequency,
        };
        let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
        for (page, file, cols) in [
            ("README.md", "pairs.csv", columns::<analysis::PairRow>()),
            ("README.md", "bins.csv", columns::<bins::Bin>()),
            (
                "README.md",
                "per-frequency.csv",
                columns::<per_frequency::PerFrequencyRow>(),
            ),
            (
                "README.md",
                "per-frequency-covariance.csv",
                columns::<per_frequency::PerFrequencyCovarianceRow>(),
            ),
            (
                "README.md",
                "hd-spread.csv",
                columns::<hd_spread::HdSpreadRow>(),
            ),
            (
                "README.md",
                "bins-covariance.csv",
                columns::<bin_covariance::BinCovarianceRow>(),
            ),
            (
                "README.md",
                "posterior-fixed-index.csv",
                columns::<common::FixedRow>(),
            ),
            (
                "README.md",
                "posterior-grid.csv",
                columns::<common::GridRow>(),
            ),
            (
                "README.md",
                "marginals.csv",
                columns::<common::MarginalRow>(),
            ),
            ("docs/null.md", "trials.csv", columns::<null::TrialRow>()),
            (
                "docs/injection.md",
                "trials.csv",
                columns::<null::TrialRow>(),
            ),
            (
                "docs/injection.md",
                "recovery.csv",
                columns::<inject::RecoveryRow>(),
            ),
            (
                "docs/injection.md",
                "realizations.csv",
                columns::<inject::Record>(),
            ),
            (
                "docs/injection.md",
                "coverage_plugin.csv",
                columns::<inject::PluginRow>(),
            ),
            (
                "docs/noise-estimation.md",
                "estimates.csv",
                columns::<noise_fit::Estimate>(),
            ),
            (
                "docs/noise-estimation.md",
                "diagnostics.csv",
                columns::<noise_fit::DiagnosticsRow>(),
            ),
            (
                "docs/noise-estimation.md",
                "truth.csv",
                columns::<noise_fit::truth::TruthValue>(),
            ),
        ] {
            assert!(cols.contains(','), "{file}: no columns from its row type");
            let text = std::fs::read_to_string(root.join(page)).unwrap();
            assert!(
                code_spans(&text).contains(&cols),
                "{page} does not document the columns of {file}: `{cols}`"
            );
        }
    }
}
