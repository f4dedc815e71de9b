//! The engine's typed errors as Python exceptions. Every exception is a `ptacorr.Error`; its
//! message is the engine's own (file, line and field for input errors), and its attributes carry
//! the same parts for programs.

use pyo3::create_exception;
use pyo3::exceptions::PyException;
use pyo3::prelude::*;

create_exception!(
    ptacorr,
    Error,
    PyException,
    "Base class of every error the ptacorr engine reports."
);
create_exception!(
    ptacorr,
    InputError,
    Error,
    "A value in an input file is malformed or out of range. Attributes: path, line (or None), field (or None), message."
);
create_exception!(
    ptacorr,
    SettingError,
    Error,
    "A setting passed by the caller is invalid. Attributes: name, message."
);
create_exception!(
    ptacorr,
    NumericalError,
    Error,
    "A matrix that must be positive definite is not, or a computation produced a non-finite number."
);
create_exception!(
    ptacorr,
    FileError,
    Error,
    "A file could not be read or written. Attributes: path, message."
);

/// The Python exception of an engine error, with the engine's message and its parts as
/// attributes.
pub fn to_py_err(py: Python<'_>, e: ptacorr::Error) -> PyErr {
    let text = e.to_string();
    let err = match &e {
        ptacorr::Error::Input { .. } => InputError::new_err(text),
        ptacorr::Error::Setting { .. } => SettingError::new_err(text),
        ptacorr::Error::Io { .. } => FileError::new_err(text),
        ptacorr::Error::NotPositiveDefinite { .. } | ptacorr::Error::NonFinite { .. } => {
            NumericalError::new_err(text)
        }
    };
    let v = err.value(py);
    let set = |k: &str, val: Bound<'_, PyAny>| {
        let _ = v.setattr(k, val);
    };
    let none = || py.None().into_bound(py);
    match e {
        ptacorr::Error::Input {
            path,
            line,
            field,
            message,
        } => {
            set(
                "path",
                path.into_pyobject(py)
                    .map_or_else(|_| none(), |p| p.into_any()),
            );
            set(
                "line",
                line.into_pyobject(py)
                    .map_or_else(|_| none(), |p| p.into_any()),
            );
            set(
                "field",
                field
                    .into_pyobject(py)
                    .map_or_else(|_| none(), |p| p.into_any()),
            );
            set(
                "message",
                message
                    .into_pyobject(py)
                    .map_or_else(|_| none(), |p| p.into_any()),
            );
        }
        ptacorr::Error::Setting { name, message } => {
            set(
                "name",
                name.into_pyobject(py)
                    .map_or_else(|_| none(), |p| p.into_any()),
            );
            set(
                "message",
                message
                    .into_pyobject(py)
                    .map_or_else(|_| none(), |p| p.into_any()),
            );
        }
        ptacorr::Error::Io { path, source } => {
            set(
                "path",
                path.into_pyobject(py)
                    .map_or_else(|_| none(), |p| p.into_any()),
            );
            set(
                "message",
                source
                    .to_string()
                    .into_pyobject(py)
                    .map_or_else(|_| none(), |p| p.into_any()),
            );
        }
        _ => {}
    }
    err
}
