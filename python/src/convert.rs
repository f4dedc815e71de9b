//! serde values (the engine's serialisable results) as Python objects: JSON-like values become
//! dicts, lists, floats, ints, bools, strings and None; tables of rows become dicts of columns.

use numpy::PyArray1;
use pyo3::prelude::*;
use pyo3::types::{PyBool, PyDict, PyList};
use serde_json::Value;

/// A JSON value as the matching Python object.
pub fn json_to_py<'py>(py: Python<'py>, v: &Value) -> PyResult<Bound<'py, PyAny>> {
    Ok(match v {
        Value::Null => py.None().into_bound(py),
        Value::Bool(b) => PyBool::new(py, *b).to_owned().into_any(),
        Value::Number(n) => {
            if let Some(i) = n.as_i64() {
                i.into_pyobject(py)?.into_any()
            } else if let Some(u) = n.as_u64() {
                u.into_pyobject(py)?.into_any()
            } else {
                n.as_f64().unwrap_or(f64::NAN).into_pyobject(py)?.into_any()
            }
        }
        Value::String(s) => s.into_pyobject(py)?.into_any(),
        Value::Array(a) => {
            let l = PyList::empty(py);
            for x in a {
                l.append(json_to_py(py, x)?)?;
            }
            l.into_any()
        }
        Value::Object(o) => {
            let d = PyDict::new(py);
            for (k, x) in o {
                d.set_item(k, json_to_py(py, x)?)?;
            }
            d.into_any()
        }
    })
}

/// Rows (JSON objects with the same keys) as a dict of columns: a float64 NumPy array for a
/// column of numbers, a list otherwise. Columns are in the order of their names.
pub fn columns<'py>(py: Python<'py>, rows: &[Value]) -> PyResult<Bound<'py, PyDict>> {
    let d = PyDict::new(py);
    let Some(Value::Object(first)) = rows.first() else {
        return Ok(d);
    };
    for key in first.keys() {
        let cells: Vec<&Value> = rows.iter().map(|r| &r[key.as_str()]).collect();
        if cells.iter().all(|c| c.is_number()) {
            let v: Vec<f64> = cells
                .iter()
                .map(|c| c.as_f64().unwrap_or(f64::NAN))
                .collect();
            // The vector's buffer becomes the array's (no copy).
            d.set_item(key, PyArray1::from_vec(py, v))?;
        } else {
            let l = PyList::empty(py);
            for c in cells {
                l.append(json_to_py(py, c)?)?;
            }
            d.set_item(key, l)?;
        }
    }
    Ok(d)
}
