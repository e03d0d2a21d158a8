"""LAPACK's accuracy on the NIST StRD linear least-squares sets in this folder.

Reads each *.dat file here (see README.md beside it), builds the design matrix
as tidemark's tests do (a leading 1, then the predictors; for a polynomial
model x, x*x, x*x*x, ... by repeated multiplication) and solves it two ways
with numpy's LAPACK: Householder QR (numpy.linalg.qr, then back substitution)
and the SVD-based numpy.linalg.lstsq. It prints the log relative error
-log10(|b - c| / |c|) of every coefficient against NIST's certified value c,
capped at 15, and the minimum per set. lapack_lre.txt is its output.

Run: python3 lapack_lre.py > lapack_lre.txt  (Debian's python3-numpy)
"""
import glob
import os
import platform
import sys

import numpy as np


def read(path):
    kind, k, cert, rows = None, 0, None, []
    for line in open(path):
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        f = line.split()
        if f[0] == "model":
            kind, k = f[1], int(f[2])
        elif f[0] == "certified":
            cert = np.array([float(v) for v in f[1:]])
        else:
            rows.append([float(v) for v in f])
    rows = np.array(rows)
    y = rows[:, 0]
    if kind == "polynomial":
        x = rows[:, 1]
        cols = [np.ones_like(x)]
        for _ in range(k):
            cols.append(cols[-1] * x)
        X = np.column_stack(cols)
    else:
        X = np.column_stack([np.ones(len(y)), rows[:, 1:]])
    return X, y, cert


def lre(b, c):
    out = []
    for bi, ci in zip(b, c):
        if bi == ci:
            out.append(15.0)
        else:
            out.append(min(15.0, -np.log10(abs(bi - ci) / abs(ci))))
    return np.array(out)


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    print("# python %s, numpy %s" % (platform.python_version(), np.__version__))
    print("# set      method  min_lre  lre per coefficient")
    for path in sorted(glob.glob(os.path.join(here, "*.dat"))):
        name = os.path.basename(path)[:-4]
        X, y, cert = read(path)
        q, r = np.linalg.qr(X)
        b_qr = np.linalg.solve(r, q.T @ y)
        b_svd = np.linalg.lstsq(X, y, rcond=None)[0]
        for method, b in (("qr", b_qr), ("lstsq", b_svd)):
            l = lre(b, cert)
            print("%-9s %-6s %6.2f  %s" % (name, method, l.min(), " ".join("%.2f" % v for v in l)))


if __name__ == "__main__":
    sys.exit(main())
