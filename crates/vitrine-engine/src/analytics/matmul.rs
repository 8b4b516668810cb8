//! The one matrix product of the analytics (k-means scores, logistic-regression logits and
//! gradients): a checked, single-threaded call of the `gemm` crate's kernel. Callers split
//! their rows into blocks and run blocks in parallel, so results do not depend on the thread
//! count.

/// The element types the product runs on.
pub(crate) trait Scalar: Copy + 'static {
    const ONE: Self;
}

impl Scalar for f32 {
    const ONE: Self = 1.0;
}

impl Scalar for f64 {
    const ONE: Self = 1.0;
}

/// A row-major `rows x cols` buffer, read as stored or as its transpose.
pub(crate) struct Operand<'a, T> {
    pub data: &'a [T],
    pub rows: usize,
    pub cols: usize,
    pub transposed: bool,
}

impl<T> Operand<'_, T> {
    /// The shape of the matrix as read.
    fn shape(&self) -> (usize, usize) {
        if self.transposed {
            (self.cols, self.rows)
        } else {
            (self.rows, self.cols)
        }
    }

    /// Column and row strides of the matrix as read.
    fn strides(&self) -> (isize, isize) {
        if self.transposed {
            (self.cols as isize, 1)
        } else {
            (1, self.cols as isize)
        }
    }
}

/// `dst = lhs · rhs`, or `dst += lhs · rhs` when `accumulate`; `dst` is row-major with as many
/// rows as `lhs` and as many columns as `rhs` (as read).
pub(crate) fn multiply<T: Scalar>(
    dst: &mut [T],
    lhs: &Operand<'_, T>,
    rhs: &Operand<'_, T>,
    accumulate: bool,
) {
    let (m, k) = lhs.shape();
    let (inner, n) = rhs.shape();
    assert_eq!(k, inner, "inner dimensions of a matrix product");
    assert!(lhs.data.len() >= lhs.rows * lhs.cols && rhs.data.len() >= rhs.rows * rhs.cols);
    assert!(dst.len() >= m * n);
    let (lhs_cs, lhs_rs) = lhs.strides();
    let (rhs_cs, rhs_rs) = rhs.strides();
    // SAFETY: the asserts above keep every index the kernel touches inside the three
    // buffers: `dst` holds m x n row-major, and each operand holds its rows x cols.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            dst.as_mut_ptr(),
            1,
            n as isize,
            accumulate,
            lhs.data.as_ptr(),
            lhs_cs,
            lhs_rs,
            rhs.data.as_ptr(),
            rhs_cs,
            rhs_rs,
            T::ONE,
            T::ONE,
            false,
            false,
            false,
            gemm::Parallelism::None,
        );
    }
}
