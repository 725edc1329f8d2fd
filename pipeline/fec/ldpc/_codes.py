"""The CCSDS LDPC codes of 131.0-B sec. 7: C2 (8160,7136) and the AR4JA family.

A code is described by a small frozen :class:`LdpcCode` (what a profile selects); its sparse
parity-check matrix (:func:`parity_check`) and its quasi-cyclic generator (:func:`qc_generator`)
are built on first use and cached for the life of the process, never at import.

Decoder variable layout (the columns of H, "variables"), and how the sent codeword maps onto it:

* C2: 8176 variables, the basic (8176,7156) code.  Variables 0..17 are the 18 shortened
  information bits (always 0, not sent), 18..7153 the 7136 information bits, 7154..8175 the
  1022 parity bits.  The sent codeword is variables 18..8175 followed by the two extension bits
  (both 0): sent bits 8158 and 8159, the last two of the 8160.  The extension bits are in no
  parity check (they are outside the basic code), so the decoder ignores their soft values and
  they carry no information; the 18 shortened bits enter the decoder as certain zeros.
  Source: CCSDS 130.1-G-2 sec. 8 ("first 18 information bits" set to zero and not sent, "two
  zeros" appended after the codeword); ../shared/REFERENCES.md sec. 13.1 ("transmitted layout").
* AR4JA: M (K + 3) variables in the column order of H: K M information bits, then the 3 M parity
  bits; the sent codeword is the first M (K + 2) of them and the last M (the punctured block
  column of H) enter the decoder as erasures.  Source: CCSDS 131.0-B-2 sec. 7.4.3.5.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np

from pipeline.fec.ldpc._gf2 import gf2_rref, pack_rows, unpack_rows

__all__ = [
    "LdpcCode",
    "LdpcFamily",
    "LDPC_FAMILIES",
    "AR4JA_RATES",
    "AR4JA_K",
    "ldpc_code",
    "ldpc_codes",
    "SparseParityCheck",
    "parity_check",
    "qc_generator",
    "ar4ja_permutation",
    "expurgation_failures",
]

LdpcFamily = Literal["c2", "ar4ja"]
LDPC_FAMILIES: tuple[str, ...] = get_args(LdpcFamily)
#: AR4JA rates (CCSDS 131.0-B-2 sec. 7.4.3.2 note) and information block lengths (Table 7-5).
AR4JA_RATES: tuple[str, ...] = ("1/2", "2/3", "4/5")
AR4JA_K: tuple[int, ...] = (1024, 4096, 16384)
_AR4JA_KK = {"1/2": 2, "2/3": 4, "4/5": 8}  # K of rate K/(K+2)

# C2: first-row one positions of the 2 x 16 circulants A_i,j of size 511 (CCSDS 131.0-B-2 Table 7-1).
_C2_CIRCULANT = 511
_C2_A = (
    ((0, 176), (12, 239), (0, 352), (24, 431), (0, 392), (151, 409), (0, 351), (9, 359),
     (0, 307), (53, 329), (0, 207), (18, 281), (0, 399), (202, 457), (0, 247), (36, 261)),
    ((99, 471), (130, 473), (198, 435), (260, 478), (215, 420), (282, 481), (48, 396), (193, 445),
     (273, 430), (302, 451), (96, 379), (191, 386), (244, 467), (364, 470), (51, 382), (192, 414)),
)
_C2_SHORTENED = 18
_C2_EXTENSION = 2
# The two checks that expurgate the basic (8176,7156) code to the (8176,7154) subcode, each the sum of the
# 511-blocks flagged here (block 0 first): ../shared/REFERENCES.md sec. 13.1, "expurgation, seen as checks"
# (principle: CCSDS 130.1-G-2 sec. 8; the vectors computed there, the only ones orthogonal to the subcode).
_C2_EXPURGATION_BLOCKS = ("0000110101111101", "0000011011100110")
_C2_EXPURGATION_FLAGS = np.array([[int(f) for f in row] for row in _C2_EXPURGATION_BLOCKS], np.int32).T
_BYTE_PARITY = np.array([bin(v).count("1") & 1 for v in range(256)], np.uint8)

# AR4JA theta_k and phi_k(j, M), k = 1..26 (CCSDS 131.0-B-5 Tables 7-3, 7-4 as carried by a
# general-purpose LDPC design library; 60 phi values confirmed in 131.0-B-2 p. 7-10: see
# ../shared/REFERENCES.md sec. 13.2).  _AR4JA_PHI[M][j][k - 1].
_AR4JA_THETA = (3, 0, 1, 2, 2, 3, 0, 1, 0, 1, 2, 0, 2, 3, 0, 1, 2, 0, 1, 2, 0, 1, 2, 1, 2, 3)
_AR4JA_PHI = {
    128: (
        (1, 22, 0, 26, 0, 10, 5, 18, 3, 22, 3, 8, 25, 25, 2, 27, 7, 7, 15, 10, 4, 19, 7, 9, 26, 17),
        (0, 27, 30, 28, 7, 1, 8, 20, 26, 24, 4, 12, 23, 15, 15, 22, 31, 3, 29, 21, 2, 5, 11, 26, 9, 17),
        (0, 12, 30, 18, 10, 16, 13, 9, 7, 15, 16, 18, 4, 23, 5, 3, 29, 11, 4, 8, 2, 11, 11, 3, 15, 13),
        (0, 13, 19, 14, 15, 20, 17, 4, 4, 11, 17, 20, 8, 22, 19, 15, 5, 21, 17, 9, 20, 18, 31, 13, 2, 18),
    ),
    256: (
        (59, 18, 52, 23, 11, 7, 22, 25, 27, 30, 43, 14, 46, 62, 44, 12, 38, 47, 1, 52, 61, 10, 55, 7, 12, 2),
        (0, 32, 21, 36, 30, 29, 44, 29, 39, 14, 22, 15, 48, 55, 39, 11, 1, 50, 40, 62, 27, 38, 40, 15, 11, 18),
        (0, 46, 45, 27, 48, 37, 41, 13, 9, 49, 36, 10, 11, 18, 54, 40, 27, 35, 25, 46, 24, 33, 18, 37, 35, 21),
        (0, 44, 51, 12, 15, 12, 4, 7, 2, 30, 53, 23, 29, 37, 42, 48, 4, 10, 18, 56, 9, 11, 23, 8, 7, 24),
    ),
    512: (
        (16, 103, 105, 0, 50, 29, 115, 30, 92, 78, 70, 66, 39, 84, 79, 70, 29, 32, 45, 113, 86, 1, 42, 118, 33, 126),
        (0, 53, 74, 45, 47, 0, 59, 102, 25, 3, 88, 65, 62, 68, 91, 70, 115, 31, 121, 45, 56, 54, 108, 14, 30, 116),
        (0, 8, 119, 89, 31, 122, 1, 69, 92, 47, 11, 31, 19, 66, 49, 81, 96, 38, 83, 42, 58, 24, 25, 92, 38, 120),
        (0, 35, 97, 112, 64, 93, 99, 94, 103, 91, 3, 6, 39, 113, 92, 119, 74, 73, 116, 31, 127, 98, 23, 38, 18, 62),
    ),
    1024: (
        (160, 241, 185, 251, 209, 103, 90, 184, 248, 12, 111, 66, 173,
         42, 157, 174, 104, 144, 43, 181, 250, 202, 68, 177, 170, 89),
        (0, 182, 249, 65, 70, 141, 237, 77, 55, 12, 227, 42, 52,
         243, 179, 250, 247, 164, 17, 31, 149, 105, 183, 153, 177, 19),
        (0, 35, 167, 214, 84, 206, 122, 67, 147, 54, 23, 93, 20,
         197, 46, 162, 101, 76, 78, 253, 124, 143, 63, 41, 214, 70),
        (0, 162, 7, 31, 164, 11, 237, 125, 133, 99, 105, 17, 97,
         91, 211, 128, 82, 115, 248, 62, 26, 140, 121, 12, 41, 249),
    ),
    2048: (
        (108, 126, 238, 481, 96, 28, 59, 225, 323, 28, 386, 305, 34,
         510, 147, 199, 347, 391, 165, 414, 97, 158, 86, 168, 506, 489),
        (0, 375, 436, 350, 260, 84, 318, 382, 169, 213, 67, 313, 242,
         188, 1, 306, 397, 80, 33, 7, 447, 336, 424, 134, 152, 492),
        (0, 219, 16, 263, 415, 403, 184, 279, 198, 307, 432, 240, 454,
         294, 479, 289, 373, 104, 141, 270, 439, 333, 399, 14, 277, 412),
        (0, 312, 503, 388, 48, 7, 185, 328, 254, 202, 285, 11, 168,
         127, 8, 437, 475, 85, 419, 459, 468, 209, 311, 211, 510, 320),
    ),
    4096: (
        (226, 618, 404, 32, 912, 950, 534, 63, 971, 304, 409, 708, 719,
         176, 743, 759, 674, 958, 984, 11, 413, 925, 687, 752, 867, 323),
        (0, 767, 227, 247, 284, 370, 482, 273, 886, 634, 762, 184, 696,
         413, 854, 544, 864, 82, 1009, 437, 36, 562, 816, 452, 290, 778),
        (0, 254, 790, 642, 248, 899, 328, 518, 477, 404, 698, 160, 497,
         100, 518, 92, 464, 592, 198, 856, 235, 134, 542, 545, 777, 483),
        (0, 285, 554, 809, 185, 49, 101, 82, 898, 627, 154, 65, 81,
         823, 50, 413, 462, 175, 715, 537, 722, 37, 488, 179, 430, 264),
    ),
    8192: (
        (1148, 2032, 249, 1807, 485, 1044, 717, 873, 364, 1926, 1241, 1769, 532,
         768, 1138, 965, 141, 1527, 505, 1312, 1840, 709, 1427, 989, 1925, 270),
        (0, 1822, 203, 882, 1989, 957, 1705, 1083, 1072, 354, 1942, 446, 1456,
         1940, 1660, 1661, 587, 708, 1466, 433, 1345, 867, 1551, 2041, 1383, 1790),
        (0, 318, 494, 1467, 757, 1085, 1630, 64, 689, 1300, 148, 777, 1431,
         659, 352, 1177, 836, 1572, 348, 1040, 779, 476, 191, 1393, 1752, 1627),
        (0, 1189, 458, 460, 1039, 1000, 1265, 1223, 874, 1292, 1491, 631, 464,
         461, 844, 392, 922, 256, 1986, 19, 266, 471, 1166, 1300, 1033, 1606),
    ),
}

# AR4JA H by block rows (CCSDS 131.0-B sec. 7.4.2, Figs. 7-3 to 7-5; ../shared/REFERENCES.md sec. 13.2):
# for each block column the permutations summed in it, 0 = identity.  The rate 2/3 and 4/5
# matrices put 2 and 4 more block columns in front of the rate 1/2 one; the last block column
# is the punctured one.
_AR4JA_H12 = (
    ((), (), (0,), (), (0, 1)),
    ((0,), (0,), (), (0,), (2, 3, 4)),
    ((0,), (5, 6), (), (7, 8), (0,)),
)
_AR4JA_H23_FRONT = (((), ()), ((9, 10, 11), (0,)), ((0,), (12, 13, 14)))
_AR4JA_H45_FRONT = (
    ((), (), (), ()),
    ((21, 22, 23), (0,), (15, 16, 17), (0,)),
    ((0,), (24, 25, 26), (0,), (18, 19, 20)),
)


@dataclass(frozen=True)
class LdpcCode:
    """One CCSDS LDPC code, as a link profile selects it (``ldpc``, ``ldpc_rate``, ``ldpc_k``).

    Build it with :func:`ldpc_code`.  Lengths are in bits.

    Attributes
    ----------
    family : {"c2", "ar4ja"}
    rate : str
        ``"223/255"`` for C2, else the AR4JA rate ``"1/2" | "2/3" | "4/5"``.
    k : int
        Information bits per codeword (one transfer frame of ``k // 8`` octets).
    n : int
        Bits sent per codeword (after the ASM; 8160 for C2, M (K + 2) for AR4JA).
    n_var : int
        Columns of the parity-check matrix H (decoder variables): 8176 for C2, M (K + 3) for AR4JA.
    n_check : int
        Rows of H: 1022 for C2 (rank 1020), 3 M for AR4JA.
    head_zeros : int
        Leading variables fixed to 0 and not sent (C2: the 18 shortened information bits).
    punctured : int
        Trailing variables not sent (AR4JA: the last M columns of H).
    extension : int
        Zero bits appended to the sent codeword outside H (C2: 2).
    circulant : int
        Size of the circulants of H and of the generator (511 for C2, M / 4 for AR4JA).

    Examples
    --------
    >>> code = ldpc_code("ar4ja", rate="1/2", k=1024)
    >>> code.n, code.n_var, code.punctured, code.frame_octets
    (2048, 2560, 512, 128)
    >>> ldpc_code("c2").name
    'C2 (8160,7136)'
    """

    family: str
    rate: str
    k: int
    n: int
    n_var: int
    n_check: int
    head_zeros: int
    punctured: int
    extension: int
    circulant: int

    @property
    def name(self) -> str:
        """Short label, e.g. ``'AR4JA r=1/2 (2048,1024)'``."""
        if self.family == "c2":
            return f"C2 ({self.n},{self.k})"
        return f"AR4JA r={self.rate} ({self.n},{self.k})"

    @property
    def frame_octets(self) -> int:
        """Transfer frame length carried by one codeword, octets (892 for C2; 128, 512, 2048)."""
        return self.k // 8

    @property
    def code_rate(self) -> float:
        """Information bits per sent bit, k / n."""
        return self.k / self.n

    @property
    def sent_vars(self) -> int:
        """Sent bits that are decoder variables (n minus the extension bits)."""
        return self.n - self.extension

    @property
    def info_start(self) -> int:
        """Variable index of the first information bit."""
        return self.head_zeros

    @property
    def m(self) -> int:
        """AR4JA submatrix size M (0 for C2)."""
        return self.n_var // (_AR4JA_KK[self.rate] + 3) if self.family == "ar4ja" else 0


def ldpc_code(family: str, *, rate: str | None = None, k: int | None = None) -> LdpcCode:
    """The :class:`LdpcCode` named by a profile's ``ldpc``, ``ldpc_rate`` and ``ldpc_k``.

    Parameters
    ----------
    family : {"c2", "ar4ja"}
    rate : {"1/2", "2/3", "4/5"}, optional
        AR4JA only (required there); for C2 it must be None or ``"223/255"``.
    k : {1024, 4096, 16384}, optional
        AR4JA information bits (required there); for C2 None or 7136.

    Returns
    -------
    LdpcCode

    References
    ----------
    CCSDS 131.0-B-2 sec. 7.3.1 (C2), sec. 7.4.3 and Table 7-5 (AR4JA).

    Examples
    --------
    >>> ldpc_code("ar4ja", rate="4/5", k=16384).n
    20480
    """
    if family == "c2":
        if rate not in (None, "223/255"):
            raise ValueError(f"Argument 'rate' must be None for C2, not {rate!r}.")
        if k not in (None, 7136):
            raise ValueError(f"Argument 'k' must be None for C2, not {k!r}.")
        return LdpcCode(family="c2", rate="223/255", k=7136, n=8160, n_var=16 * _C2_CIRCULANT,
                        n_check=2 * _C2_CIRCULANT, head_zeros=_C2_SHORTENED, punctured=0,
                        extension=_C2_EXTENSION, circulant=_C2_CIRCULANT)
    if family != "ar4ja":
        raise ValueError(f"Argument 'family' must be one of {', '.join(LDPC_FAMILIES)}, not {family!r}.")
    if rate not in AR4JA_RATES:
        raise ValueError(f"Argument 'rate' must be one of {', '.join(AR4JA_RATES)} for AR4JA, not {rate!r}.")
    if isinstance(k, bool) or k not in AR4JA_K:
        raise ValueError(f"Argument 'k' must be one of {', '.join(map(str, AR4JA_K))} for AR4JA, not {k!r}.")
    kk = _AR4JA_KK[rate]
    m = k // kk
    return LdpcCode(family="ar4ja", rate=rate, k=k, n=m * (kk + 2), n_var=m * (kk + 3), n_check=3 * m,
                    head_zeros=0, punctured=m, extension=0, circulant=m // 4)


def ldpc_codes() -> tuple[LdpcCode, ...]:
    """Every code: C2, then AR4JA by k and rate (10 codes)."""
    return (ldpc_code("c2"),) + tuple(ldpc_code("ar4ja", rate=r, k=k) for k in AR4JA_K for r in AR4JA_RATES)


@dataclass(frozen=True, eq=False)
class SparseParityCheck:
    """H in compressed sparse rows: the columns of row ``r`` are ``cols[row_start[r]:row_start[r + 1]]``.

    Columns within a row are increasing; ``row_start`` and ``cols`` are int32 and read-only.
    """

    row_start: np.ndarray
    cols: np.ndarray
    n_rows: int
    n_cols: int

    @property
    def n_edges(self) -> int:
        """Ones in H (edges of the Tanner graph)."""
        return int(self.cols.size)

    def syndrome(self, bits) -> np.ndarray:
        """``H c^T mod 2`` for ``c`` of shape (n_cols,) or (codewords, n_cols); uint8 per row."""
        bits = np.asarray(bits, dtype=np.uint8)
        picked = bits[..., self.cols].astype(np.int64)
        return (np.add.reduceat(picked, self.row_start[:-1].astype(np.int64), axis=-1) & 1).astype(np.uint8)

    def to_dense(self) -> np.ndarray:
        """H as a dense uint8 0/1 array (rows x columns)."""
        h = np.zeros((self.n_rows, self.n_cols), dtype=np.uint8)
        rows = np.repeat(np.arange(self.n_rows), np.diff(self.row_start))
        h[rows, self.cols] = 1
        return h


def expurgation_failures(code: LdpcCode, words: np.ndarray) -> np.ndarray:
    """Unsatisfied expurgation checks of decoded codewords (C2: 0, 1 or 2 each; AR4JA: always 0).

    Parameters
    ----------
    code : LdpcCode
    words : numpy.ndarray of uint8, shape (codewords, n / 8)
        The sent codewords packed MSB first (:attr:`LdpcResult.codewords`).

    Returns
    -------
    numpy.ndarray of int32, shape (codewords,)

    Notes
    -----
    C2's H (1022 rows, rank 1020) is the parity-check matrix of the basic (8176,7156) code; the sent
    code is its (8176,7154) subcode, which two more checks select, each constant on the 511-blocks:
    the sum of the bits of the blocks flagged ``0000110101111101`` and of those flagged
    ``0000011011100110`` must be even.  A word with a zero syndrome on H may still fail them (a word
    of the basic code outside the subcode).  Cost: one pass over the packed octets
    (:func:`~pipeline.fec.ldpc._kernels.block_parity_kernel`), about 1 us per codeword.

    References
    ----------
    CCSDS 131.0-B-2 sec. 7.3.4 (the subcode); CCSDS 130.1-G-2 sec. 8 (expurgation as added checks).

    Examples
    --------
    >>> from pipeline.fec.ldpc import ldpc_encode
    >>> c2 = ldpc_code("c2")
    >>> word = ldpc_encode(c2, bytes(892))[None].copy()
    >>> int(expurgation_failures(c2, word)[0])
    0
    >>> word[0, 1000] ^= 0x80                 # one parity bit of block 15 (in the first check only)
    >>> int(expurgation_failures(c2, word)[0])
    1
    """
    from pipeline.fec.ldpc._kernels import block_parity_kernel

    words = np.ascontiguousarray(np.atleast_2d(np.asarray(words, dtype=np.uint8)))
    if code.family != "c2":
        return np.zeros(words.shape[0], np.int32)
    b = code.circulant
    parity = np.zeros((words.shape[0], code.n_var // b), np.uint8)
    block_parity_kernel(words, code.sent_vars, code.head_zeros, b, _BYTE_PARITY, parity)
    return ((parity.astype(np.int32) @ _C2_EXPURGATION_FLAGS) & 1).sum(axis=1).astype(np.int32)


def ar4ja_permutation(index: int, m: int) -> np.ndarray:
    """pi_k for k = ``index`` (1..26) and submatrix size ``m``: row i of Pi_k has its one at column pi_k(i).

    Notes
    -----
    ``pi_k(i) = (M/4) ((theta_k + floor(4 i / M)) mod 4) + (phi_k(floor(4 i / M), M) + i) mod (M/4)``.

    References
    ----------
    CCSDS 131.0-B-5 sec. 7.4.2.4 (via ../shared/REFERENCES.md sec. 13.2).

    Examples
    --------
    >>> int(ar4ja_permutation(1, 512)[0])
    400
    """
    if m not in _AR4JA_PHI:
        raise ValueError(f"Argument 'm' must be one of {', '.join(map(str, _AR4JA_PHI))}, not {m!r}.")
    if not 1 <= index <= 26:
        raise ValueError(f"Argument 'index' must be 1..26, not {index!r}.")
    i = np.arange(m, dtype=np.int64)
    b = m // 4
    j = i // b
    phi = np.asarray([row[index - 1] for row in _AR4JA_PHI[m]], dtype=np.int64)
    return b * ((_AR4JA_THETA[index - 1] + j) % 4) + (phi[j] + i) % b


def _csr(rows: np.ndarray, cols: np.ndarray, n_rows: int, n_cols: int) -> SparseParityCheck:
    """CSR of the GF(2) sum of the listed ones (a pair listed twice cancels)."""
    key = rows.astype(np.int64) * n_cols + cols.astype(np.int64)
    uniq, count = np.unique(key, return_counts=True)
    uniq = uniq[count % 2 == 1]
    r = uniq // n_cols
    c = (uniq % n_cols).astype(np.int32)
    row_start = np.zeros(n_rows + 1, dtype=np.int32)
    np.cumsum(np.bincount(r, minlength=n_rows), out=row_start[1:])
    for a in (row_start, c):
        a.flags.writeable = False
    return SparseParityCheck(row_start=row_start, cols=c, n_rows=n_rows, n_cols=n_cols)


def _ar4ja_layout(rate: str) -> list[list[tuple[int, ...]]]:
    """Block rows of H for ``rate``: the rate 4/5 and 2/3 front columns, then those of rate 1/2."""
    fronts = {"1/2": (), "2/3": (_AR4JA_H23_FRONT,), "4/5": (_AR4JA_H45_FRONT, _AR4JA_H23_FRONT)}[rate]
    return [[blk for f in fronts for blk in f[a]] + list(_AR4JA_H12[a]) for a in range(3)]


@functools.cache
def parity_check(code: LdpcCode) -> SparseParityCheck:
    """The parity-check matrix H of ``code`` (all ``n_var`` columns), built once and cached.

    Parameters
    ----------
    code : LdpcCode

    Returns
    -------
    SparseParityCheck
        C2: 1022 x 8176, row weight 32, column weight 4.  AR4JA: 3 M x M (K + 3).

    Notes
    -----
    C2: row ``r`` of circulant A_i,j has ones at ``(p + r) mod 511`` for the two first-row
    positions ``p`` of Table 7-1.  AR4JA: block rows of M x M identities and permutation sums.

    References
    ----------
    CCSDS 131.0-B-2 sec. 7.3.2, 7.3.3 and Table 7-1 (C2); sec. 7.4.2 (AR4JA).

    Examples
    --------
    >>> h = parity_check(ldpc_code("c2"))
    >>> h.n_rows, h.n_cols, h.n_edges
    (1022, 8176, 32704)
    """
    if code.family == "c2":
        b = _C2_CIRCULANT
        r = np.arange(b)
        rows, cols = [], []
        for a, blocks in enumerate(_C2_A):
            for j, positions in enumerate(blocks):
                for p in positions:
                    rows.append(a * b + r)
                    cols.append(j * b + (p + r) % b)
        return _csr(np.concatenate(rows), np.concatenate(cols), 2 * b, 16 * b)
    m = code.m
    i = np.arange(m)
    perms = {t: ar4ja_permutation(t, m) for t in range(1, 27)}
    rows, cols = [], []
    for a, blocks in enumerate(_ar4ja_layout(code.rate)):
        for j, terms in enumerate(blocks):
            for t in terms:
                rows.append(a * m + i)
                cols.append(j * m + (i if t == 0 else perms[t]))
    return _csr(np.concatenate(rows), np.concatenate(cols), code.n_check, code.n_var)


@functools.cache
def qc_generator(code: LdpcCode) -> np.ndarray:
    """First rows of the circulants of the systematic generator's parity part, built once and cached.

    Parameters
    ----------
    code : LdpcCode

    Returns
    -------
    numpy.ndarray of uint8, shape (blocks, segments, b), read-only
        ``b = code.circulant``.  Row ``blk`` is the parity of the information unit vector at the
        start of block ``blk`` (all information bits in blocks of ``b``: for C2 the 14 blocks
        of the (8176,7154) subcode including the 18 shortened bits, for AR4JA the 4 K blocks),
        as ``segments`` circulant segments (C2: 2, the first rows b_i,1 and b_i,2 of Table C-1;
        AR4JA: 12, the 3 M parity bits including the punctured M).  The parity of unit vector
        ``r`` of a block is every segment rotated right by ``r`` (H is quasi-cyclic with the
        same circulant size, so the code and its systematic encoder are too).

    Notes
    -----
    C2 (131.0-B-2 sec. 7.3.4.3): with D = [A1,15 A1,16; A2,15 A2,16] and M_i = [A1,i; A2,i],
    solve ``M_i u^T + D z_i^T = 0`` with u = (1, 0, ..., 0) and z_i's 511th and 1022nd bits
    forced to 0 (that forcing is the expurgation to the (8176,7154) subcode): one Gauss-Jordan
    elimination of D without those two columns, 14 right-hand sides.
    AR4JA (sec. 7.4.3.3-7.4.3.4): W = (P^-1 Q)^T with P the last 3 M columns of H and Q the
    first M K.  P's block structure (the same for all rates) reduces ``P p = s`` to one M x M
    system: with A = Pi2 + Pi3 + Pi4 and B = Pi7 + Pi8, ``(I + B A) p4 = s2 + B s1``,
    ``p3 = s1 + A p4``, ``p2 = s0 + (I + Pi1) p4``; Gauss-Jordan on ``I + B A`` with the 4 K
    right-hand sides.  Cost: under 0.1 s for C2 and k = 1024, a few s for M = 8192.

    References
    ----------
    CCSDS 131.0-B-2 sec. 7.3.4, Annex C Table C-1 (C2); sec. 7.4.3 (AR4JA).
    """
    gen = _c2_generator(code) if code.family == "c2" else _ar4ja_generator(code)
    gen.flags.writeable = False
    return gen


def _solve(system: np.ndarray, rhs: np.ndarray, what: str) -> np.ndarray:
    """Solve ``system x = rhs`` (dense 0/1; full column rank, consistent) for every rhs column."""
    n_rows, n_cols = system.shape
    reduced, pivots = gf2_rref(pack_rows(np.concatenate([system, rhs], axis=1)), n_cols)
    if pivots.size != n_cols:
        raise RuntimeError(f"{what}: the system has rank {pivots.size}, not {n_cols}")
    full = unpack_rows(reduced, n_cols + rhs.shape[1])
    if full[n_cols:, n_cols:].any():
        raise RuntimeError(f"{what}: the system is inconsistent")
    return full[:n_cols, n_cols:]  # pivots are 0..n_cols-1 in order, so row r holds x[r]


def _c2_generator(code: LdpcCode) -> np.ndarray:
    b = _C2_CIRCULANT
    h = parity_check(code).to_dense()
    par = h[:, 14 * b:]
    keep = np.ones(2 * b, dtype=bool)
    keep[[b - 1, 2 * b - 1]] = False  # z_i's 511th and 1022nd elements are 0
    rhs = h[:, [blk * b for blk in range(14)]]
    z = np.zeros((2 * b, 14), dtype=np.uint8)
    z[keep] = _solve(par[:, keep], rhs, "C2 generator")
    return np.ascontiguousarray(z.T.reshape(14, 2, b))


def _ar4ja_generator(code: LdpcCode) -> np.ndarray:
    m, b = code.m, code.circulant
    kk = _AR4JA_KK[code.rate]
    p = {t: ar4ja_permutation(t, m) for t in (1, 2, 3, 4, 7, 8)}
    i = np.arange(m)
    # T = I + B A: row i of B A is row pi7(i) plus row pi8(i) of A, row r of A has ones at pi2..4(r)
    t_rows = np.concatenate([i] + [i] * 6)
    t_cols = np.concatenate([i] + [p[a][p[c]] for c in (7, 8) for a in (2, 3, 4)])
    t = np.zeros((m, m), dtype=np.uint8)
    np.add.at(t, (t_rows, t_cols), 1)
    t &= 1
    # s = Q e for the first unit vector of each information block: column blk*b of H
    h = parity_check(code)
    n_blk = 4 * kk
    s = np.zeros((n_blk, 3 * m), dtype=np.uint8)
    rows_of = np.repeat(np.arange(h.n_rows), np.diff(h.row_start))
    for blk in range(n_blk):
        s[blk, rows_of[h.cols == blk * b]] ^= 1
    s0, s1, s2 = s[:, :m], s[:, m:2 * m], s[:, 2 * m:]
    rhs = s2 ^ s1[:, p[7]] ^ s1[:, p[8]]
    p4 = _solve(t, np.ascontiguousarray(rhs.T), f"{code.name} generator").T
    p3 = s1 ^ p4[:, p[2]] ^ p4[:, p[3]] ^ p4[:, p[4]]
    p2 = s0 ^ p4 ^ p4[:, p[1]]
    return np.ascontiguousarray(np.concatenate([p2, p3, p4], axis=1).reshape(n_blk, 12, b))
