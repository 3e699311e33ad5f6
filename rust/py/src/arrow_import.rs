//! Zero-copy import of Arrow record batches through the Arrow PyCapsule interface.

use arrow_array::ffi::{from_ffi, FFI_ArrowArray, FFI_ArrowSchema};
use arrow_array::{Array, RecordBatch, StructArray};
use arrow_schema::DataType;
use pyo3::exceptions::{PyTypeError, PyValueError};
use pyo3::ffi;
use pyo3::prelude::*;
use pyo3::types::PyTuple;

fn capsule_pointer(
    capsule: &Bound<'_, PyAny>,
    name: &std::ffi::CStr,
) -> PyResult<*mut std::ffi::c_void> {
    // SAFETY: PyCapsule_IsValid accepts any object pointer and checks type, name and pointer.
    let valid = unsafe { ffi::PyCapsule_IsValid(capsule.as_ptr(), name.as_ptr()) };
    if valid != 1 {
        return Err(PyTypeError::new_err(format!(
            "expected a PyCapsule named {name:?} from __arrow_c_array__"
        )));
    }
    // SAFETY: the capsule was just checked to be valid under this name.
    Ok(unsafe { ffi::PyCapsule_GetPointer(capsule.as_ptr(), name.as_ptr()) })
}

/// Imports a record batch from any object with `__arrow_c_array__` whose type is a struct
/// (pyarrow.RecordBatch, polars and others). The buffers are shared, not copied.
pub fn import_batch(obj: &Bound<'_, PyAny>) -> PyResult<RecordBatch> {
    if !obj.hasattr("__arrow_c_array__")? {
        return Err(PyTypeError::new_err(format!(
            "expected an Arrow record batch (an object with __arrow_c_array__), got {}",
            obj.get_type().name()?
        )));
    }
    let pair = obj.call_method0("__arrow_c_array__")?;
    let pair = pair
        .cast::<PyTuple>()
        .map_err(|_| PyTypeError::new_err("__arrow_c_array__ must return a tuple"))?;
    if pair.len() != 2 {
        return Err(PyTypeError::new_err(
            "__arrow_c_array__ must return (schema, array) capsules",
        ));
    }
    let schema_capsule = pair.get_item(0)?;
    let array_capsule = pair.get_item(1)?;
    let schema_ptr = capsule_pointer(&schema_capsule, c"arrow_schema")?.cast::<FFI_ArrowSchema>();
    let array_ptr = capsule_pointer(&array_capsule, c"arrow_array")?.cast::<FFI_ArrowArray>();
    // SAFETY: the capsules hold a valid ArrowSchema and ArrowArray (the PyCapsule interface's
    // contract). The array is moved out and the capsule's copy is left released (empty), so the
    // capsule destructor does not free what we now own; the schema is only borrowed.
    let data = unsafe {
        let array = std::ptr::replace(array_ptr, FFI_ArrowArray::empty());
        from_ffi(array, &*schema_ptr)
    }
    .map_err(|e| PyValueError::new_err(format!("could not import the Arrow batch: {e}")))?;
    if !matches!(data.data_type(), DataType::Struct(_)) {
        return Err(PyTypeError::new_err(format!(
            "expected an Arrow record batch (struct type), got an array of type {}",
            data.data_type()
        )));
    }
    let array = StructArray::from(data);
    if array.null_count() > 0 {
        return Err(PyValueError::new_err(
            "a record batch cannot have null rows at the top level",
        ));
    }
    Ok(RecordBatch::from(array))
}
