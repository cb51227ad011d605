"""Writes the .npy fixtures tests/train/test_npy.c reads. Run with Debian's NumPy:
    /usr/bin/python3 make_npy_fixtures.py
The files are committed so the C test checks our reader against bytes numpy.save produced.
Each array is a simple formula the C test recomputes (see the comment beside each)."""
import numpy as np

# value[i] = 0.25 * i - 1, shape (3, 4)
np.save("f32_3x4.npy", (np.arange(12, dtype="<f4") * 0.25 - 1).reshape(3, 4))
# linspace(-1, 1, 5)
np.save("f64_5.npy", np.linspace(-1.0, 1.0, 5))
# value[i] = i - 3, shape (2, 3), int64
np.save("i64_2x3.npy", (np.arange(6, dtype="<i8") - 3).reshape(2, 3))
# int32 [7, -8, 9]
np.save("i32_3.npy", np.array([7, -8, 9], dtype="<i4"))
# big-endian float32 [[1.5, -2], [3.25, 0.001]]
np.save("be_f4_2x2.npy", np.array([[1.5, -2.0], [3.25, 0.001]], dtype=">f4"))
# Fortran order: the C-order array arange(6).reshape(2, 3) stored column-major
np.save("fortran_f4_2x3.npy", np.asfortranarray(np.arange(6, dtype="<f4").reshape(2, 3)))
# 0-d scalar 7.5
np.save("scalar_f4.npy", np.array(7.5, dtype="<f4"))
# empty (0, 3)
np.save("empty_f4_0x3.npy", np.zeros((0, 3), dtype="<f4"))
# bool [True, False, True], uint8 [0, 200, 255]
np.save("bool_3.npy", np.array([True, False, True]))
np.save("u8_3.npy", np.array([0, 200, 255], dtype=np.uint8))
# format version 2.0 of value[i] = 0.25 * i - 1, shape (3, 4)
with open("v2_f32_3x4.npy", "wb") as f:
    np.lib.format.write_array(f, (np.arange(12, dtype="<f4") * 0.25 - 1).reshape(3, 4),
                              version=(2, 0))
# a structured dtype, which we refuse
np.save("struct.npy", np.zeros(2, dtype=[("a", "<f4"), ("b", "<i4")]))
