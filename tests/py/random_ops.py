"""Random ONNX models for tilecut's differential test (tests/python_reference.rs).

Writes single-op models with shapes and attributes drawn at random; chains of ops over
x[1, C, H, W] with H and W symbolic (with exporter-style shape arithmetic: Shape, Gather,
Concat, Reshape, Resize sizes); chains over x[B, S, D] as transformer and audio encoders
write them; and models with a Loop, Scan, If or sequence. They go into a folder, and the
output shapes the `onnx` package's two references give are printed as JSON: the reference
evaluator (`onnx.reference`) running the model, and `onnx.shape_inference.infer_shapes`
(strict, with data propagation). A case is exact where both references agree on every
output (or shape inference leaves it open) and no output is empty. Where they disagree on a
single-op model both accept (seen: numpy slicing in the evaluator for negative steps and
clamped ends, pools with ceil_mode, Resize, ConvTranspose, STFT), the case lists the other
reference's shapes, and the specification text's where both deviate from it, as
`alternatives`: this check does not adjudicate between them. Chains are kept only where the
references agree on every tensor. A Loop's scan outputs are written per the specification
(the evaluator concatenates what the specification stacks).

Usage: random_ops.py OUT_DIR SEED SINGLE_COUNT CHAIN_COUNT (CHAIN_COUNT of each kind)
"""
import json, os, random, sys, warnings

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

OUT, SEED, SINGLES, CHAINS = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
R = random.Random(SEED)


def rshape(rank=None, lo=1, hi=6):
    rank = R.randint(1, 4) if rank is None else rank
    return [R.randint(lo, hi) for _ in range(rank)]


def f32(shape):
    return np.asarray(np.random.RandomState(R.randint(0, 1 << 30)).randn(*shape)).astype(np.float32)


def i64(vals):
    return np.array(vals, dtype=np.int64)


class G:
    """One node over fresh graph inputs (data) and initializers (const)."""

    def __init__(self, op, domain=""):
        self.op, self.domain = op, domain
        self.inputs, self.feeds, self.inits, self.attrs = [], {}, [], {}
        self.n_out = 1
        self.opset = 21

    def data(self, arr):
        n = f"x{len(self.inputs)}"
        self.inputs.append(n)
        self.feeds[n] = arr
        return self

    def const(self, arr):
        n = f"c{len(self.inputs)}"
        self.inputs.append(n)
        self.inits.append(numpy_helper.from_array(arr, n))
        return self

    def skip(self):
        self.inputs.append("")
        return self

    def build(self, types=None, ranks=None):
        outs = [f"y{i}" for i in range(self.n_out)]
        node = helper.make_node(self.op, self.inputs, outs, domain=self.domain, **self.attrs)
        gin = [helper.make_tensor_value_info(n, helper.np_dtype_to_tensor_dtype(a.dtype), a.shape)
               for n, a in self.feeds.items()]
        if types is None:
            gout = [helper.make_tensor_value_info(o, TensorProto.FLOAT, None) for o in outs]
        else:
            # Symbolic output dims: the checker wants a shape, and tilecut must infer it.
            gout = [helper.make_tensor_value_info(o, t, [f"o{j}_{k}" for k in range(r)])
                    for j, (o, t, r) in enumerate(zip(outs, types, ranks))]
        g = helper.make_graph([node], "g", gin, gout, self.inits)
        m = helper.make_model(g, opset_imports=[helper.make_opsetid("", self.opset)])
        m.ir_version = 10
        return m


def conv():
    g = G("Conv")
    nd = R.randint(1, 3)
    n, grp = R.randint(1, 2), R.choice([1, 1, 2])
    cin = grp * R.randint(1, 3)
    cout = grp * R.randint(1, 3)
    sp = [R.randint(5, 9) for _ in range(nd)]  # at least the widest kernel extent, 5
    k = [R.randint(1, 3) for _ in range(nd)]
    g.data(f32([n, cin] + sp)).const(f32([cout, cin // grp] + k))
    if R.random() < 0.3:
        g.const(f32([cout]))
    a = g.attrs
    a["group"] = grp
    if R.random() < 0.5:
        a["strides"] = [R.randint(1, 3) for _ in range(nd)]
    if R.random() < 0.4:
        a["dilations"] = [R.randint(1, 2) for _ in range(nd)]
    ap = R.choice(["NOTSET", "NOTSET", "SAME_UPPER", "SAME_LOWER", "VALID"])
    if ap != "NOTSET":
        a["auto_pad"] = ap
    elif R.random() < 0.5:
        a["pads"] = [R.randint(0, 2) for _ in range(2 * nd)]
    if R.random() < 0.3:
        a["kernel_shape"] = k
    return g


def conv_t():
    g = G("ConvTranspose")
    nd = R.randint(1, 2)
    grp = R.choice([1, 1, 2])
    cin = grp * R.randint(1, 2)
    cout = grp * R.randint(1, 2)
    sp = [R.randint(2, 6) for _ in range(nd)]
    k = [R.randint(1, 3) for _ in range(nd)]
    g.data(f32([1, cin] + sp)).const(f32([cin, cout // grp] + k))
    a = g.attrs
    a["group"] = grp
    st = [R.randint(1, 3) for _ in range(nd)]
    if R.random() < 0.6:
        a["strides"] = st
    else:
        st = [1] * nd
    if R.random() < 0.3:
        a["dilations"] = [R.randint(1, 2) for _ in range(nd)]
    r = R.random()
    if r < 0.2:
        a["output_shape"] = [s * t + R.randint(0, 1) for s, t in zip(sp, st)]
    elif r < 0.4:
        a["auto_pad"] = R.choice(["SAME_UPPER", "SAME_LOWER", "VALID"])
    elif r < 0.7:
        a["pads"] = [R.randint(0, 1) for _ in range(2 * nd)]
    if R.random() < 0.3:
        a["output_padding"] = [R.randint(0, t - 1) for t in st]
    return g


def pool(op):
    def f():
        g = G(op)
        nd = R.randint(1, 3)
        sp = [R.randint(5, 9) for _ in range(nd)]  # at least the widest kernel extent, 5
        g.data(f32([1, 2] + sp))
        a = g.attrs
        k = [R.randint(1, 3) for _ in range(nd)]
        a["kernel_shape"] = k
        if R.random() < 0.5:
            a["strides"] = [R.randint(1, 3) for _ in range(nd)]
        if op != "LpPool" and R.random() < 0.3:
            a["dilations"] = [R.randint(1, 2) for _ in range(nd)]
        ap = R.choice(["NOTSET", "NOTSET", "SAME_UPPER", "SAME_LOWER", "VALID"])
        if ap != "NOTSET":
            a["auto_pad"] = ap
        elif R.random() < 0.5:
            a["pads"] = [R.randint(0, k[i % nd] - 1) for i in range(2 * nd)]
        if R.random() < 0.4:
            a["ceil_mode"] = 1
        if op == "AveragePool" and R.random() < 0.5:
            a["count_include_pad"] = 1
        if op == "MaxPool" and R.random() < 0.3:
            g.n_out = 2
        return g
    return f


def resize():
    g = G("Resize")
    rank = R.randint(3, 4)
    shp = rshape(rank, 1, 6)
    g.data(f32(shp))
    a = g.attrs
    axes = None
    if R.random() < 0.3:
        axes = sorted(R.sample(range(rank), R.randint(1, rank)))
        a["axes"] = axes
    m = len(axes) if axes else rank
    mode = R.choice(["nearest", "linear", "cubic"])
    a["mode"] = mode
    if R.random() < 0.5:
        g.skip().const(np.array([R.choice([0.5, 1.0, 1.5, 2.0, 0.7, 3.0]) for _ in range(m)], dtype=np.float32))
    else:
        g.skip().skip().const(i64([R.randint(1, 9) for _ in range(m)]))
        if R.random() < 0.4:
            a["keep_aspect_ratio_policy"] = R.choice(["not_larger", "not_smaller"])
    return g


def slice_():
    g = G("Slice")
    rank = R.randint(1, 4)
    shp = rshape(rank, 1, 8)
    g.data(f32(shp))
    k = R.randint(1, rank)
    axes = R.sample(range(rank), k)
    if R.random() < 0.3:
        axes = [x - rank for x in axes]
    starts = [R.randint(-10, 10) for _ in axes]
    ends = [R.choice([R.randint(-10, 10), 2**62, -2**62, 2**63 - 1]) for _ in axes]
    steps = [R.choice([1, 1, 2, -1, -2, 3]) for _ in axes]
    g.const(i64(starts)).const(i64(ends))
    if R.random() < 0.8:
        g.const(i64(axes))
        if R.random() < 0.8:
            g.const(i64(steps))
    return g


def pad():
    g = G("Pad")
    rank = R.randint(1, 4)
    shp = rshape(rank, 1, 5)
    g.data(f32(shp))
    mode = R.choice(["constant", "reflect", "edge", "wrap"])
    g.attrs["mode"] = mode
    axes = list(range(rank))
    use_axes = R.random() < 0.4
    if use_axes:
        axes = R.sample(range(rank), R.randint(1, rank))
    lo = -1 if mode == "constant" else 0
    pads = [R.randint(lo, 3) for _ in range(2 * len(axes))]
    if mode == "reflect":
        pads = [min(p, shp[axes[i % len(axes)]] - 1) for i, p in enumerate(pads)]
    g.const(i64(pads))
    if use_axes:
        g.skip().const(i64(axes)) if R.random() < 0.5 else g.const(np.array(0.0, dtype=np.float32)).const(i64(axes))
    return g


def gather():
    g = G(R.choice(["Gather", "GatherElements", "GatherND"]))
    rank = R.randint(1, 4)
    shp = rshape(rank, 1, 5)
    g.data(f32(shp))
    if g.op == "Gather":
        ax = R.randint(-rank, rank - 1)
        ish = rshape(R.randint(0, 3), 1, 4)
        g.const(np.random.RandomState(1).randint(-shp[ax], shp[ax], size=ish).astype(np.int64))
        g.attrs["axis"] = ax
    elif g.op == "GatherElements":
        ax = R.randint(-rank, rank - 1)
        ish = [R.randint(1, s) for s in shp]
        g.const(np.random.RandomState(1).randint(0, shp[ax], size=ish).astype(np.int64))
        g.attrs["axis"] = ax
    else:
        b = R.randint(0, rank - 1)
        last = R.randint(1, rank - b)
        ish = shp[:b] + rshape(R.randint(0, 2), 1, 3) + [last]
        idx = np.zeros(ish, dtype=np.int64)
        g.const(idx)
        g.attrs["batch_dims"] = b
    return g


def split():
    g = G("Split")
    g.opset = R.choice([11, 13, 18])
    rank = R.randint(1, 4)
    shp = rshape(rank, 1, 9)
    g.data(f32(shp))
    ax = R.randint(-rank, rank - 1)
    g.attrs["axis"] = ax
    L = shp[ax]
    r = R.random()
    if r < 0.5:
        k = R.randint(1, L)
        cuts = sorted(R.sample(range(1, L), k - 1)) if k > 1 else []
        parts = [b - a for a, b in zip([0] + cuts, cuts + [L])]
        g.n_out = len(parts)
        if g.opset >= 13:
            g.const(i64(parts))
        else:
            g.attrs["split"] = parts
    else:
        n = R.randint(1, max(1, L))
        g.n_out = n
        if g.opset >= 18:
            g.attrs["num_outputs"] = n
        elif L % n:
            g.n_out = 1
    return g


def reduce_():
    op = R.choice(["ReduceSum", "ReduceMean", "ReduceMax", "ReduceMin", "ReduceProd", "ReduceL2", "ReduceLogSumExp", "ArgMax", "ArgMin"])
    g = G(op)
    g.opset = R.choice([13, 18])
    rank = R.randint(1, 4)
    g.data(f32(rshape(rank, 1, 5)))
    if R.random() < 0.5:
        g.attrs["keepdims"] = R.randint(0, 1)
    if op.startswith("Arg"):
        g.attrs["axis"] = R.randint(-rank, rank - 1)
        return g
    if R.random() < 0.8:
        axes = sorted(set(x % rank for x in R.sample(range(rank), R.randint(1, rank))))
        if R.random() < 0.3:
            axes = [x - rank for x in axes]
        if g.opset >= 18 or op == "ReduceSum":
            g.const(i64(axes))
        else:
            g.attrs["axes"] = axes
    elif R.random() < 0.5:
        g.attrs["noop_with_empty_axes"] = 1 if g.opset >= 18 else 0
    return g


def einsum():
    g = G("Einsum")
    letters = "abcde"
    n_in = R.randint(1, 3)
    dims = {c: R.randint(1, 4) for c in letters}
    terms = []
    for _ in range(n_in):
        t = "".join(R.sample(letters, R.randint(1, 3)))
        terms.append(t)
    used = sorted(set("".join(terms)))
    if R.random() < 0.6:
        out = "".join(R.sample(used, R.randint(0, len(used))))
        eq = ",".join(terms) + "->" + out
    else:
        eq = ",".join(terms)
    for t in terms:
        g.data(f32([dims[c] for c in t]))
    g.attrs["equation"] = eq
    return g


def matmul():
    g = G(R.choice(["MatMul", "Gemm"]))
    if g.op == "Gemm":
        m, k, n = R.randint(1, 5), R.randint(1, 5), R.randint(1, 5)
        ta, tb = R.randint(0, 1), R.randint(0, 1)
        g.data(f32([k, m] if ta else [m, k])).const(f32([n, k] if tb else [k, n]))
        if R.random() < 0.5:
            g.const(f32(R.choice([[n], [m, n], [1, n], [m, 1], []])))
        g.attrs["transA"], g.attrs["transB"] = ta, tb
        return g
    k = R.randint(1, 4)
    ra, rb = R.randint(1, 4), R.randint(1, 4)
    batch = rshape(4, 1, 3)
    bsa = [R.choice([b, 1]) for b in batch][4 - max(0, ra - 2):] if ra > 2 else []
    bsb = [R.choice([b, 1]) for b in batch][4 - max(0, rb - 2):] if rb > 2 else []
    a = (bsa + [R.randint(1, 4), k]) if ra >= 2 else [k]
    b = (bsb + [k, R.randint(1, 4)]) if rb >= 2 else [k]
    g.data(f32(a)).data(f32(b))
    return g


def shape_ops():
    op = R.choice(["Transpose", "Flatten", "Squeeze", "Unsqueeze", "Tile", "Expand", "Reshape", "DepthToSpace", "SpaceToDepth", "Concat", "CumSum", "Trilu", "Shape", "Size", "TopK", "OneHot", "CenterCropPad", "ReverseSequence", "Range"])
    g = G(op)
    rank = R.randint(1, 4)
    shp = rshape(rank, 1, 5)
    a = g.attrs
    if op == "Transpose":
        g.data(f32(shp))
        if R.random() < 0.8:
            a["perm"] = R.sample(range(rank), rank)
    elif op == "Flatten":
        g.data(f32(shp)); a["axis"] = R.randint(-rank, rank)
    elif op == "Squeeze":
        shp = [R.choice([1, s]) for s in shp]
        g.data(f32(shp))
        ones = [i for i, s in enumerate(shp) if s == 1]
        if ones and R.random() < 0.7:
            g.const(i64(sorted(R.sample(ones, R.randint(1, len(ones))))))
    elif op == "Unsqueeze":
        g.data(f32(shp))
        k = R.randint(1, 3)
        axes = R.sample(range(rank + k), k)
        if R.random() < 0.3:
            axes = [x - rank - k for x in axes]
        g.const(i64(axes))
    elif op == "Tile":
        g.data(f32(shp)).const(i64([R.randint(0, 3) for _ in shp]))
    elif op == "Expand":
        s2 = [R.choice([1, s]) for s in shp]
        g.data(f32(s2))
        tgt = [R.choice([s, 1]) for s in shp]
        tgt = [R.randint(1, 3) for _ in range(R.randint(0, 2))] + tgt
        g.const(i64(tgt))
    elif op == "Reshape":
        g.data(f32(shp))
        n = int(np.prod(shp))
        # factor n randomly
        out = []
        rem = n
        for _ in range(R.randint(0, 3)):
            ds = [d for d in range(1, rem + 1) if rem % d == 0]
            d = R.choice(ds)
            out.append(d); rem //= d
        out.append(rem)
        if R.random() < 0.5:
            out[R.randrange(len(out))] = -1
        if R.random() < 0.3 and len(out) <= rank:
            i = R.randrange(len(out))
            if out[i] == shp[i]:
                out[i] = 0
        g.const(i64(out))
    elif op in ("DepthToSpace", "SpaceToDepth"):
        b = R.randint(1, 3)
        if op == "DepthToSpace":
            g.data(f32([1, b * b * R.randint(1, 3), R.randint(1, 4), R.randint(1, 4)]))
            if R.random() < 0.5:
                a["mode"] = R.choice(["DCR", "CRD"])
        else:
            g.data(f32([1, 2, b * R.randint(1, 3), b * R.randint(1, 3)]))
        a["blocksize"] = b
    elif op == "Concat":
        ax = R.randint(-rank, rank - 1)
        for _ in range(R.randint(1, 3)):
            s2 = list(shp); s2[ax] = R.randint(0, 4)
            g.data(f32(s2))
        a["axis"] = ax
    elif op == "CumSum":
        g.data(f32(shp)).const(np.array(R.randint(-rank, rank - 1), dtype=np.int64))
    elif op == "Trilu":
        shp = rshape(R.randint(2, 4), 1, 5)
        g.data(f32(shp))
        if R.random() < 0.5:
            g.const(np.array(R.randint(-3, 3), dtype=np.int64))
    elif op in ("Shape", "Size"):
        g.data(f32(shp))
        if op == "Shape" and R.random() < 0.6:
            if R.random() < 0.7:
                a["start"] = R.randint(-6, 6)
            if R.random() < 0.7:
                a["end"] = R.randint(-6, 6)
    elif op == "TopK":
        ax = R.randint(-rank, rank - 1)
        g.data(f32(shp)).const(i64([R.randint(0, shp[ax])]))
        a["axis"] = ax
        g.n_out = 2
    elif op == "OneHot":
        g.data(np.random.RandomState(2).randint(0, 3, size=shp).astype(np.int64))
        g.const(np.array(R.randint(1, 5), dtype=np.int64)).const(np.array([0.0, 1.0], dtype=np.float32))
        a["axis"] = R.randint(-rank - 1, rank)
    elif op == "CenterCropPad":
        g.data(f32(shp))
        if R.random() < 0.5:
            axes = sorted(R.sample(range(rank), R.randint(1, rank)))
            a["axes"] = axes
            g.const(i64([R.randint(1, 7) for _ in axes]))
        else:
            g.const(i64([R.randint(1, 7) for _ in shp]))
    elif op == "ReverseSequence":
        shp = rshape(R.randint(2, 4), 1, 5)
        g.data(f32(shp))
        ba, ta = R.choice([(0, 1), (1, 0)])
        a["batch_axis"], a["time_axis"] = ba, ta
        g.const(i64([R.randint(1, shp[ta]) for _ in range(shp[ba])]))
    elif op == "Range":
        s, d = R.randint(-5, 5), R.choice([1, 2, -1, 3, -2])
        g.const(np.array(s, dtype=np.int64)).const(np.array(R.randint(-8, 8), dtype=np.int64)).const(np.array(d, dtype=np.int64))
    return g


def norm():
    op = R.choice(["LayerNormalization", "GroupNormalization", "InstanceNormalization", "BatchNormalization", "LpNormalization", "MeanVarianceNormalization", "Softmax", "LogSoftmax", "Hardmax", "RMSNormalization"])
    g = G(op)
    rank = R.randint(2, 4)
    shp = rshape(rank, 1, 5)
    g.data(f32(shp))
    a = g.attrs
    if op in ("LayerNormalization", "RMSNormalization"):
        g.opset = 23
        ax = R.randint(-rank, rank - 1)
        a["axis"] = ax
        g.const(f32(shp[ax:]))
        if op == "LayerNormalization" and R.random() < 0.3:
            g.n_out = 3
    elif op == "GroupNormalization":
        c = shp[1]
        ng = R.choice([d for d in range(1, c + 1) if c % d == 0])
        a["num_groups"] = ng
        g.const(f32([c])).const(f32([c]))
    elif op == "InstanceNormalization":
        g.const(f32([shp[1]])).const(f32([shp[1]]))
    elif op == "BatchNormalization":
        for _ in range(4):
            g.const(np.abs(f32([shp[1]])))
    elif op in ("Softmax", "LogSoftmax", "Hardmax", "LpNormalization"):
        a["axis"] = R.randint(-rank, rank - 1)
    return g


def misc():
    op = R.choice(["Col2Im", "GridSample", "RoiAlign", "AffineGrid", "ScatterND", "ScatterElements", "Where", "Mod", "PRelu", "Clip", "Det", "Mean", "Sum", "Max", "BitShift", "STFT", "DFT"])
    g = G(op)
    a = g.attrs
    if op == "Col2Im":
        k = [R.randint(1, 3), R.randint(1, 3)]
        img = [R.randint(k[0], 6), R.randint(k[1], 6)]
        blocks = (img[0] - k[0] + 1) * (img[1] - k[1] + 1)
        c = R.randint(1, 2)
        g.data(f32([1, c * k[0] * k[1], blocks])).const(i64(img)).const(i64(k))
    elif op == "GridSample":
        g.opset = 20
        g.data(f32([1, 2, 4, 5])).data(f32([1, R.randint(1, 4), R.randint(1, 4), 2]))
    elif op == "RoiAlign":
        nr = R.randint(1, 3)
        g.data(f32([2, 3, 6, 6])).const(np.abs(f32([nr, 4]))).const(np.zeros(nr, dtype=np.int64))
        a["output_height"], a["output_width"] = R.randint(1, 4), R.randint(1, 4)
    elif op == "AffineGrid":
        g.opset = 20
        if R.random() < 0.5:
            g.data(f32([2, 2, 3])).const(i64([2, 3, R.randint(1, 5), R.randint(1, 5)]))
        else:
            g.data(f32([2, 3, 4])).const(i64([2, 3, R.randint(1, 5), R.randint(1, 5), R.randint(1, 5)]))
    elif op == "ScatterND":
        shp = rshape(R.randint(1, 3), 2, 4)
        g.data(f32(shp))
        q = R.randint(1, len(shp))
        idx_shape = rshape(R.randint(0, 2), 1, 2) + [q]
        g.const(np.zeros(idx_shape, dtype=np.int64)).data(f32(idx_shape[:-1] + shp[q:]))
    elif op == "ScatterElements":
        shp = rshape(R.randint(1, 3), 2, 4)
        g.data(f32(shp)).const(np.zeros(shp, dtype=np.int64)).data(f32(shp))
    elif op == "Where":
        s = rshape(3, 1, 3)
        g.data(np.random.RandomState(3).rand(*[R.choice([x, 1]) for x in s]) > 0.5)
        g.data(f32([R.choice([x, 1]) for x in s][R.randint(0, 2):])).data(f32([R.choice([x, 1]) for x in s]))
    elif op in ("Mod", "PRelu", "Mean", "Sum", "Max", "BitShift"):
        s = rshape(3, 1, 3)
        for _ in range(2 if op in ("Mod", "PRelu", "BitShift") else R.randint(1, 3)):
            sub = [R.choice([x, 1]) for x in s][R.randint(0, 2):]
            if op == "BitShift":
                g.data(np.ones(sub, dtype=np.uint8))
            else:
                g.data(f32(sub) + 5)
        if op == "BitShift":
            a["direction"] = "LEFT"
    elif op == "Clip":
        g.data(f32(rshape()))
    elif op == "Det":
        n = R.randint(1, 3)
        g.data(f32(rshape(R.randint(0, 2), 1, 3) + [n, n]))
    elif op == "STFT":
        g.opset = 17
        sig = R.randint(16, 40)
        fl = R.randint(4, 16)
        g.data(f32([1, sig, 1])).const(np.array(R.randint(1, 6), dtype=np.int64))
        if R.random() < 0.5:
            g.const(np.ones(fl, dtype=np.float32)).const(np.array(fl, dtype=np.int64))
        else:
            g.skip().const(np.array(fl, dtype=np.int64))
        if R.random() < 0.5:
            a["onesided"] = R.randint(0, 1)
    elif op == "DFT":
        g.opset = 20
        shp = [1, R.randint(2, 8), R.randint(2, 5), R.choice([1, 2])]
        g.data(f32(shp))
        if R.random() < 0.5:
            g.const(np.array(R.randint(1, 10), dtype=np.int64))
        else:
            g.skip()
        g.const(np.array(R.choice([1, 2, -2]), dtype=np.int64))
        if R.random() < 0.5:
            a["onesided"] = 1
        if R.random() < 0.3:
            a["inverse"] = 1
    return g


def rnn():
    op = R.choice(["LSTM", "GRU", "RNN"])
    g = G(op)
    seq, b, inp, hid = R.randint(1, 4), R.randint(1, 3), R.randint(1, 4), R.randint(1, 4)
    d = R.choice(["forward", "reverse", "bidirectional"])
    nd = 2 if d == "bidirectional" else 1
    gates = {"LSTM": 4, "GRU": 3, "RNN": 1}[op]
    layout = R.randint(0, 1)
    g.data(f32([b, seq, inp] if layout else [seq, b, inp]))
    g.const(f32([nd, gates * hid, inp])).const(f32([nd, gates * hid, hid]))
    g.attrs.update(hidden_size=hid, direction=d, layout=layout)
    g.n_out = R.randint(1, 3 if op == "LSTM" else 2)
    return g


def legacy():
    """Ops at the older opsets many deployed exports still use, where attributes later became
    inputs: Slice-1/9, Pad-2/11, Upsample-7/9, Resize-10/11, Squeeze/Unsqueeze-11,
    ReduceMean-11, Split-2/11, Clip-6/11, TopK-1/10."""
    op = R.choice(["Slice", "Pad", "Upsample", "Resize", "Squeeze", "Unsqueeze", "ReduceMean", "Split", "Clip", "TopK"])
    g = G(op)
    rank = R.randint(1, 4)
    shp = rshape(rank, 1, 6)
    a = g.attrs
    if op == "Slice":
        g.opset = R.choice([1, 9])
        g.data(f32(shp))
        axes = R.sample(range(rank), R.randint(1, rank))
        a["starts"] = [R.randint(-6, 6) for _ in axes]
        a["ends"] = [R.choice([R.randint(-6, 6), 2**62]) for _ in axes]
        if R.random() < 0.7:
            a["axes"] = axes
        else:
            a["starts"], a["ends"] = a["starts"][:rank], a["ends"][:rank]
            n = len(a["starts"])
            a["starts"] = [R.randint(-6, 6) for _ in range(n)]
            a["ends"] = [R.randint(-6, 6) for _ in range(n)]
    elif op == "Pad":
        g.opset = R.choice([2, 11])
        g.data(f32(shp))
        pads = [R.randint(0, 2) for _ in range(2 * rank)]
        if g.opset == 2:
            a["pads"] = pads
        else:
            g.const(i64(pads))
    elif op == "Upsample":
        g.opset = R.choice([7, 9])
        shp = rshape(R.randint(3, 4), 1, 4)
        g.data(f32(shp))
        scales = [1.0, 1.0] + [R.choice([1.0, 2.0, 3.0]) for _ in shp[2:]]
        if g.opset == 7:
            a["scales"] = scales
        else:
            g.const(np.array(scales, np.float32))
    elif op == "Resize":
        g.opset = R.choice([10, 11])
        shp = rshape(4, 1, 5)
        g.data(f32(shp))
        scales = np.array([1.0, 1.0, R.choice([0.5, 2.0, 1.5]), R.choice([2.0, 1.0, 3.0])], np.float32)
        if g.opset == 10:
            g.const(scales)
        elif R.random() < 0.5:
            g.const(np.zeros([0], np.float32)).const(scales)
        else:
            g.const(np.zeros([0], np.float32)).const(np.zeros([0], np.float32)).const(
                i64(shp[:2] + [R.randint(1, 9), R.randint(1, 9)]))
    elif op == "Squeeze":
        g.opset = 11
        shp = [R.choice([1, d]) for d in shp]
        g.data(f32(shp))
        ones = [i for i, d in enumerate(shp) if d == 1]
        if ones and R.random() < 0.7:
            a["axes"] = [x - rank if R.random() < 0.3 else x for x in R.sample(ones, R.randint(1, len(ones)))]
    elif op == "Unsqueeze":
        g.opset = 11
        g.data(f32(shp))
        k = R.randint(1, 2)
        a["axes"] = R.sample(range(rank + k), k)
    elif op == "ReduceMean":
        g.opset = 11
        g.data(f32(shp))
        if R.random() < 0.7:
            a["axes"] = R.sample(range(-rank, rank), 1)
        a["keepdims"] = R.randint(0, 1)
    elif op == "Split":
        g.opset = R.choice([2, 11])
        g.data(f32(shp))
        ax = R.randrange(rank)
        a["axis"] = ax
        if shp[ax] >= 2 and R.random() < 0.6:
            cut = R.randint(1, shp[ax] - 1)
            a["split"] = [cut, shp[ax] - cut]
            g.n_out = 2
        else:
            g.n_out = 1
    elif op == "Clip":
        g.opset = R.choice([6, 11])
        g.data(f32(shp))
        if g.opset == 6:
            a["min"], a["max"] = -1.0, 1.0
        else:
            g.const(np.array(-1.0, np.float32)).const(np.array(1.0, np.float32))
    elif op == "TopK":
        g.opset = R.choice([1, 10])
        g.data(f32(shp))
        ax = R.randint(-rank, rank - 1)
        a["axis"] = ax
        k = R.randint(1, shp[ax])
        if g.opset == 1:
            a["k"] = k
        else:
            g.const(i64([k]))
        g.n_out = 2
    return g


def u8(shape):
    return np.random.RandomState(R.randint(0, 1 << 30)).randint(0, 255, size=shape).astype(np.uint8)


def quant():
    op = R.choice(["QLinearConv", "QLinearMatMul", "QuantizeLinear", "DequantizeLinear", "ConvInteger", "MatMulInteger", "DynamicQuantizeLinear"])
    g = G(op)
    a = g.attrs
    sc = lambda: np.array(0.05, dtype=np.float32)
    zp = lambda: np.array(3, dtype=np.uint8)
    if op == "QLinearConv":
        nd = R.randint(1, 2)
        cin, cout = R.randint(1, 3), R.randint(1, 3)
        sp = [R.randint(3, 7) for _ in range(nd)]
        k = [R.randint(1, 3) for _ in range(nd)]
        g.data(u8([1, cin] + sp)).const(sc()).const(zp())
        g.const(u8([cout, cin] + k))
        if R.random() < 0.5:
            g.const(np.full([cout], 0.02, dtype=np.float32)).const(np.full([cout], 2, dtype=np.uint8))
        else:
            g.const(sc()).const(zp())
        g.const(sc()).const(zp())
        if R.random() < 0.4:
            g.const(np.zeros([cout], dtype=np.int32))
        if R.random() < 0.5:
            a["strides"] = [R.randint(1, 2) for _ in range(nd)]
        if R.random() < 0.5:
            a["pads"] = [R.randint(0, 1) for _ in range(2 * nd)]
    elif op == "QLinearMatMul":
        m, k, n = R.randint(1, 4), R.randint(1, 4), R.randint(1, 4)
        b = rshape(R.randint(0, 2), 1, 3)
        g.data(u8(b + [m, k])).const(sc()).const(zp()).const(u8([k, n])).const(sc()).const(zp()).const(sc()).const(zp())
    elif op == "QuantizeLinear" or op == "DequantizeLinear":
        g.opset = 21
        rank = R.randint(1, 4)
        shp = rshape(rank, 1, 6)
        g.data(f32(shp) if op == "QuantizeLinear" else u8(shp))
        r = R.random()
        if r < 0.4:
            g.const(sc())
            if R.random() < 0.5:
                g.const(zp())
        elif r < 0.7:
            ax = R.randint(-rank, rank - 1)
            a["axis"] = ax
            g.const(np.full([shp[ax]], 0.1, dtype=np.float32)).const(np.full([shp[ax]], 1, dtype=np.uint8))
        else:
            ax = R.randint(-rank, rank - 1)
            bs = R.randint(1, 3)
            a["axis"] = ax
            a["block_size"] = bs
            ss = list(shp)
            ss[ax] = -(-shp[ax] // bs)
            g.const(np.full(ss, 0.1, dtype=np.float32)).const(np.full(ss, 1, dtype=np.uint8))
    elif op == "ConvInteger":
        sp = [R.randint(3, 7) for _ in range(2)]
        g.data(u8([1, 2] + sp)).const(u8([3, 2, 2, 2]))
    elif op == "MatMulInteger":
        b = rshape(R.randint(0, 2), 1, 3)
        g.data(u8(b + [2, 3])).const(u8([3, 4]))
    elif op == "DynamicQuantizeLinear":
        g.data(f32(rshape()))
        g.n_out = 3
    return g


def assorted():
    op = R.choice(["Attention", "RotaryEmbedding", "Upsample", "Elementwise", "LRN", "Dropout", "EinsumEll", "CastLike", "Mel"])
    g = G(op if op not in ("Elementwise", "EinsumEll", "Mel") else "Add")
    a = g.attrs
    if op == "Attention":
        g.opset = 23
        b, qn, kn, h, kvh, d, vd = R.randint(1, 2), R.randint(1, 4), R.randint(1, 4), R.choice([1, 2, 4]), None, R.randint(1, 4), R.randint(1, 4)
        kvh = R.choice([x for x in (1, 2, 4) if h % x == 0])
        if R.random() < 0.5:
            g.data(f32([b, h, qn, d])).data(f32([b, kvh, kn, d])).data(f32([b, kvh, kn, vd]))
        else:
            a["q_num_heads"], a["kv_num_heads"] = h, kvh
            g.data(f32([b, qn, h * d])).data(f32([b, kn, kvh * d])).data(f32([b, kn, kvh * vd]))
        if R.random() < 0.3:
            g.n_out = R.randint(1, 2)
    elif op == "RotaryEmbedding":
        g.opset = 23
        b, s, h, d = R.randint(1, 2), R.randint(1, 4), R.randint(1, 3), 2 * R.randint(1, 4)
        if R.random() < 0.5:
            g.data(f32([b, h, s, d]))
        else:
            g.data(f32([b, s, h * d]))
            a["num_heads"] = h
        g.const(f32([8, d // 2])).const(f32([8, d // 2])).const(np.zeros([b, s], dtype=np.int64))
    elif op == "Upsample":
        g.opset = 9
        rank = R.randint(3, 4)
        g.data(f32(rshape(rank, 1, 4))).const(np.array([1.0, 1.0] + [R.choice([1.0, 2.0, 1.5, 3.0]) for _ in range(rank - 2)], dtype=np.float32))
    elif op == "Elementwise":
        g.op = R.choice(["Add", "Mul", "Pow", "Equal", "Greater", "Div", "Sub", "Min", "Max", "And"])
        s = rshape(R.randint(1, 4), 1, 4)
        for _ in range(2):
            sub = [R.choice([x, 1]) for x in s][R.randint(0, len(s)):]
            g.data((f32(sub) > 0) if g.op == "And" else f32(sub))
    elif op == "LRN":
        g.data(f32(rshape(4, 1, 4)))
        a["size"] = R.choice([1, 3, 5])
    elif op == "Dropout":
        g.data(f32(rshape()))
        g.n_out = R.randint(1, 2)
    elif op == "EinsumEll":
        g.op = "Einsum"
        s = rshape(R.randint(0, 2), 1, 3)
        i, j, k = R.randint(1, 3), R.randint(1, 3), R.randint(1, 3)
        g.data(f32(s + [i, j])).data(f32([R.choice([x, 1]) for x in s] + [j, k]))
        a["equation"] = R.choice(["...ij,...jk->...ik", "...ij,...jk", "...ij,...jk->...i"])
    elif op == "CastLike":
        g.data(f32(rshape())).data(np.zeros([2], dtype=np.int32))
    elif op == "Mel":
        g.op = "MelWeightMatrix"
        g.opset = 17
        g.const(np.array(R.randint(2, 10), dtype=np.int64)).const(np.array(R.choice([16, 32, 64]), dtype=np.int64))
        g.const(np.array(16000, dtype=np.int64)).const(np.array(20.0, dtype=np.float32)).const(np.array(4000.0, dtype=np.float32))
    return g




class B:
    def __init__(self):
        self.nodes, self.inits, self.k = [], [], 0

    def name(self, p="t"):
        self.k += 1
        return f"{p}{self.k}"

    def const(self, arr):
        n = self.name("c")
        self.inits.append(numpy_helper.from_array(np.asarray(arr), n))
        return n

    def op(self, op, ins, n_out=1, **attrs):
        outs = [self.name() for _ in range(n_out)]
        self.nodes.append(helper.make_node(op, ins, outs, name=self.name("n"), **attrs))
        return outs[0] if n_out == 1 else outs


def step(b, x, c):
    """one random transformation of a 4-D float tensor with c channels; returns (name, c)"""
    k = R.choice(["conv", "pool", "resize_scale", "resize_sizes_shape", "slice", "pad", "transpose2", "flatten_back",
                  "convt", "concat_self", "gap", "split", "reshape_shape", "upsample_shape", "shape_slice_expand", "space",
                  "window_pad", "roll", "cut_multiple"])
    if k == "conv":
        co = R.randint(1, 4)
        kh, kw = R.randint(1, 3), R.randint(1, 3)
        w = b.const(np.zeros([co, c, kh, kw], np.float32))
        at = {"strides": [R.randint(1, 2), R.randint(1, 2)]}
        if R.random() < 0.5:
            at["pads"] = [R.randint(0, 1) for _ in range(4)]
        elif R.random() < 0.5:
            at["auto_pad"] = R.choice(["SAME_UPPER", "SAME_LOWER"])
        if R.random() < 0.3:
            at["dilations"] = [R.randint(1, 2), R.randint(1, 2)]
        return b.op("Conv", [x, w], **at), co
    if k == "convt":
        co = R.randint(1, 3)
        w = b.const(np.zeros([c, co, 2, 2], np.float32))
        at = {"strides": [R.randint(1, 2), R.randint(1, 2)]}
        if R.random() < 0.5:
            at["pads"] = [R.randint(0, 1) for _ in range(4)]
        return b.op("ConvTranspose", [x, w], **at), co
    if k == "pool":
        op = R.choice(["MaxPool", "AveragePool"])
        at = {"kernel_shape": [R.randint(1, 2), R.randint(1, 2)], "strides": [R.randint(1, 2), R.randint(1, 2)]}
        if R.random() < 0.4:
            at["ceil_mode"] = 1
        return b.op(op, [x], **at), c
    if k == "gap":
        return b.op(R.choice(["GlobalAveragePool", "GlobalMaxPool"]), [x]), c
    if k == "resize_scale":
        s = b.const(np.array([1, 1, R.choice([0.5, 2.0, 1.5]), R.choice([0.5, 2.0, 1.0])], np.float32))
        return b.op("Resize", [x, "", s], mode=R.choice(["nearest", "linear"])), c
    if k == "resize_sizes_shape":
        # sizes = Shape(x)[0:2] ++ Shape(x)[2:4] * 2 (exporter pattern)
        sh = b.op("Shape", [x])
        head = b.op("Slice", [sh, b.const(i64([0])), b.const(i64([2]))])
        tail = b.op("Slice", [sh, b.const(i64([2])), b.const(i64([4]))])
        tail2 = b.op("Mul", [tail, b.const(i64([R.randint(1, 3)]))])
        sizes = b.op("Concat", [head, tail2], axis=0)
        return b.op("Resize", [x, "", "", sizes], mode="nearest"), c
    if k == "upsample_shape":
        # scales computed as float from shapes: Cast(Shape) / Cast(Shape) pattern
        sh = b.op("Cast", [b.op("Shape", [x])], to=TensorProto.FLOAT)
        sc = b.op("Div", [b.op("Mul", [sh, b.const(np.array([1, 1, 2, 2], np.float32))]), sh])
        return b.op("Resize", [x, "", sc], mode="nearest"), c
    if k == "slice":
        ax = R.choice([2, 3])
        st = R.randint(-3, 3)
        en = R.choice([R.randint(-3, 6), 2**62, -2**62])
        sp = R.choice([1, 2, -1])
        return b.op("Slice", [x, b.const(i64([st])), b.const(i64([en])), b.const(i64([ax])), b.const(i64([sp]))]), c
    if k == "pad":
        pads = b.const(i64([0, 0, R.randint(0, 2), R.randint(0, 2), 0, 0, R.randint(0, 2), R.randint(0, 2)]))
        return b.op("Pad", [x, pads]), c
    if k == "transpose2":
        t = b.op("Transpose", [x], perm=[0, 1, 3, 2])
        return b.op("Transpose", [t], perm=[0, 1, 3, 2]), c
    if k == "flatten_back":
        # [N,C,H,W] -> [N,C,H*W] via shape arithmetic -> back
        sh = b.op("Shape", [x])
        n_c = b.op("Gather", [sh, b.const(i64([0, 1]))], axis=0)
        h = b.op("Gather", [sh, b.const(i64(2))], axis=0)
        w = b.op("Gather", [sh, b.const(i64(3))], axis=0)
        hw = b.op("Unsqueeze", [b.op("Mul", [h, w]), b.const(i64([0]))])
        flat = b.op("Reshape", [x, b.op("Concat", [n_c, hw], axis=0)])
        if R.random() < 0.5:
            flat = b.op("Softmax", [flat], axis=-1)
        back = b.op("Concat", [n_c, b.op("Unsqueeze", [h, b.const(i64([0]))]), b.const(i64([-1]))], axis=0)
        return b.op("Reshape", [flat, back]), c
    if k == "concat_self":
        return b.op("Concat", [x, x], axis=R.choice([1, 2, 3])), c  # c fixed below
    if k == "split":
        ax = R.choice([1, 2, 3])
        if ax == 1 and c < 2:
            return x, c
        parts = b.op("Split", [x], n_out=2, axis=ax, num_outputs=2)
        y = parts[0] if R.random() < 0.5 else parts[1]
        return y, (c // 2 if ax == 1 and y == parts[0] else c - c // 2 if ax == 1 else c)
    if k == "reshape_shape":
        # Reshape(x, [0, 0, -1, W]) style with 0s
        sh = b.op("Shape", [x])
        w = b.op("Slice", [sh, b.const(i64([-1])), b.const(i64([2**62]))])
        tgt = b.op("Concat", [b.const(i64([0, 0, -1])), w], axis=0)
        return b.op("Reshape", [x, tgt]), c
    if k == "shape_slice_expand":
        # Expand a [1,C,1,1] to Shape(x)
        sh = b.op("Shape", [x])
        e = b.op("Expand", [b.const(np.zeros([1, c, 1, 1], np.float32)), sh])
        return b.op("Add", [x, e]), c
    if k == "space":
        if R.random() < 0.5:
            return b.op("SpaceToDepth", [x], blocksize=1), c
        return b.op("DepthToSpace", [x], blocksize=1), c
    if k == "window_pad":
        # pad H and W up to a multiple of k with pads (k - size % k) % k computed from the
        # shape (window attention exports), then, half the time, crop back to Shape(x)
        win = b.const(i64(R.randint(2, 7)))
        sh = b.op("Shape", [x])
        hw = [b.op("Gather", [sh, b.const(i64(a))], axis=0) for a in (2, 3)]
        pads = [b.op("Mod", [b.op("Sub", [win, b.op("Mod", [d, win])]), win]) for d in hw]
        pads = [b.op("Unsqueeze", [p, b.const(i64([0]))]) for p in pads]
        y = b.op("Pad", [x, b.op("Concat", [b.const(i64([0, 0, 0, 0, 0, 0])), *pads], axis=0)])
        if R.random() < 0.5:
            ends = b.op("Slice", [sh, b.const(i64([2])), b.const(i64([4]))])
            y = b.op("Slice", [y, b.const(i64([0, 0])), ends, b.const(i64([2, 3]))])
        return y, c
    if k == "roll":
        # torch.roll along H or W: the last k then the rest, concatenated
        ax, sh_ = R.choice([2, 3]), R.randint(1, 3)
        tail = b.op("Slice", [x, b.const(i64([-sh_])), b.const(i64([2**62])), b.const(i64([ax]))])
        head = b.op("Slice", [x, b.const(i64([0])), b.const(i64([-sh_])), b.const(i64([ax]))])
        return b.op("Concat", [tail, head], axis=ax), c
    if k == "cut_multiple":
        # x[:, :, :H - H % k]: H cut down to a multiple of k
        ax = R.choice([2, 3])
        d = b.op("Gather", [b.op("Shape", [x]), b.const(i64(ax))], axis=0)
        end = b.op("Sub", [d, b.op("Mod", [d, b.const(i64(R.randint(2, 5)))])])
        end = b.op("Unsqueeze", [end, b.const(i64([0]))])
        return b.op("Slice", [x, b.const(i64([0])), end, b.const(i64([ax]))]), c
    return x, c



SINGLE = [conv, conv_t, pool("MaxPool"), pool("AveragePool"), pool("LpPool"), resize, slice_, pad, gather,
          split, reduce_, einsum, matmul, shape_ops, norm, misc, rnn, quant, assorted, legacy]


def seq_step(b, x, d):
    """one random transformation of a [B, S, D] float tensor, as transformer and audio
    exports write them (shape arithmetic on Shape(x) where they do); returns (name, d)"""
    k = R.choice(["linear", "layernorm", "heads", "attention", "position", "causal", "conv1d", "cls", "pad",
                  "downsample", "last", "gelu_residual", "flatten_heads", "expand_batch"])
    if k == "linear":
        d2 = R.choice([4, 8, 12])
        y = b.op("MatMul", [x, b.const(np.zeros([d, d2], np.float32))])
        return b.op("Add", [y, b.const(np.zeros([d2], np.float32))]), d2
    if k == "layernorm":
        return b.op("LayerNormalization", [x, b.const(np.ones([d], np.float32)), b.const(np.zeros([d], np.float32))],
                    axis=-1), d
    if k in ("heads", "attention", "flatten_heads"):
        h = R.choice([v for v in (1, 2, 4) if d % v == 0])
        sh = b.op("Shape", [x])
        bs = b.op("Slice", [sh, b.const(i64([0])), b.const(i64([2]))])
        split = b.op("Reshape", [x, b.op("Concat", [bs, b.const(i64([h, d // h]))], axis=0)])
        q = b.op("Transpose", [split], perm=[0, 2, 1, 3])
        if k == "attention":
            kt = b.op("Transpose", [split], perm=[0, 2, 3, 1])
            scores = b.op("Softmax", [b.op("Div", [b.op("MatMul", [q, kt]), b.const(np.array(2.0, np.float32))])],
                          axis=-1)
            q = b.op("MatMul", [scores, q])
        back = b.op("Transpose", [q], perm=[0, 2, 1, 3])
        if k == "flatten_heads" or R.random() < 0.5:
            # [B, S, h, d/h] -> [B, S, D] with Reshape(0, 0, -1)
            return b.op("Reshape", [back, b.const(i64([0, 0, -1]))]), d
        s_dim = b.op("Gather", [sh, b.const(i64(1))], axis=0)
        b_dim = b.op("Gather", [sh, b.const(i64(0))], axis=0)
        tgt = b.op("Concat", [b.op("Unsqueeze", [b_dim, b.const(i64([0]))]),
                              b.op("Unsqueeze", [s_dim, b.const(i64([0]))]), b.const(i64([d]))], axis=0)
        return b.op("Reshape", [back, tgt]), d
    if k == "position":
        # positions table sliced to the sequence length read off the input
        s_len = b.op("Gather", [b.op("Shape", [x]), b.const(i64([1]))], axis=0)
        pos = b.op("Slice", [b.const(np.zeros([64, d], np.float32)), b.const(i64([0])), s_len, b.const(i64([0]))])
        return b.op("Add", [x, pos]), d
    if k == "causal":
        s_len = b.op("Gather", [b.op("Shape", [x]), b.const(i64(1))], axis=0)
        r = b.op("Range", [b.const(i64(0)), s_len, b.const(i64(1))])
        mask = b.op("Less", [b.op("Unsqueeze", [r, b.const(i64([0]))]), b.op("Unsqueeze", [r, b.const(i64([1]))])])
        bias = b.op("Where", [mask, b.const(np.array(-1e4, np.float32)), b.const(np.array(0.0, np.float32))])
        scores = b.op("MatMul", [x, b.op("Transpose", [x], perm=[0, 2, 1])])
        att = b.op("Softmax", [b.op("Add", [scores, bias])], axis=-1)
        return b.op("MatMul", [att, x]), d
    if k == "conv1d":
        d2 = R.choice([4, 8])
        kk, st = R.randint(1, 3), R.randint(1, 2)
        t = b.op("Transpose", [x], perm=[0, 2, 1])
        at = {"strides": [st]}
        if R.random() < 0.5:
            at["pads"] = [R.randint(0, 1), R.randint(0, 1)]
        y = b.op("Conv", [t, b.const(np.zeros([d2, d, kk], np.float32))], **at)
        return b.op("Transpose", [y], perm=[0, 2, 1]), d2
    if k == "cls":
        # a learned token expanded to the batch and put in front: S + 1
        b_dim = b.op("Slice", [b.op("Shape", [x]), b.const(i64([0])), b.const(i64([1]))])
        tgt = b.op("Concat", [b_dim, b.const(i64([1, d]))], axis=0)
        cls = b.op("Expand", [b.const(np.zeros([1, 1, d], np.float32)), tgt])
        return b.op("Concat", [cls, x], axis=1), d
    if k == "pad":
        return b.op("Pad", [x, b.const(i64([0, R.randint(0, 3), 0, 0, R.randint(0, 3), 0]))]), d
    if k == "downsample":
        return b.op("Slice", [x, b.const(i64([R.randint(0, 1)])), b.const(i64([2**63 - 1])), b.const(i64([1])),
                              b.const(i64([R.randint(2, 3)]))]), d
    if k == "last":
        # the last position kept with its axis: Slice(-1, INT64_MAX)
        return b.op("Slice", [x, b.const(i64([-1])), b.const(i64([2**63 - 1])), b.const(i64([1]))]), d
    if k == "gelu_residual":
        y = b.op("Mul", [x, b.op("Sigmoid", [b.op("Mul", [x, b.const(np.array(1.702, np.float32))])])])
        return b.op("Add", [x, y]), d
    if k == "expand_batch":
        sh = b.op("Shape", [x])
        return b.op("Add", [x, b.op("Expand", [b.const(np.zeros([1, 1, d], np.float32)), sh])]), d
    return x, d


def control():
    """A model with a subgraph or a sequence: a Loop of fixed trip count with a carried value
    and a scan output, a Scan over a sequence axis, an If on a constant condition whose
    branches differ in shape, or a tensor split to a sequence and joined back. Returns
    (model, feeds, the output shapes the specification gives where the evaluator deviates)."""
    k = R.choice(["loop", "scan", "if", "sequence"])
    spec = None
    shp = rshape(R.randint(1, 3), 1, 5)
    x = f32(shp)
    xin = helper.make_tensor_value_info("x", TensorProto.FLOAT, shp)
    inits, nodes, outs = [], [], []
    if k == "loop":
        trips = R.randint(1, 4)
        inits += [numpy_helper.from_array(i64(trips), "m"), numpy_helper.from_array(np.array(True), "c")]
        body_nodes = [helper.make_node("Identity", ["c_in"], ["c_out"]),
                      helper.make_node("Add", ["v_in", "x"], ["v_out"])]
        scan = R.choice(["same", "reduced", "cast"])
        if scan == "same":
            body_nodes.append(helper.make_node("Mul", ["v_in", "v_in"], ["s_out"]))
        elif scan == "reduced":
            body_nodes.append(helper.make_node("ReduceSum", ["v_in", "ax"], ["s_out"], keepdims=0))
            body_nodes.insert(0, helper.make_node("Constant", [], ["ax"], value=numpy_helper.from_array(i64([0]))))
        else:
            body_nodes.append(helper.make_node("Cast", ["i"], ["s_out"], to=TensorProto.FLOAT))
        body = helper.make_graph(
            body_nodes, "body",
            [helper.make_tensor_value_info("i", TensorProto.INT64, []),
             helper.make_tensor_value_info("c_in", TensorProto.BOOL, []),
             helper.make_tensor_value_info("v_in", TensorProto.FLOAT, None)],
            [helper.make_tensor_value_info("c_out", TensorProto.BOOL, []),
             helper.make_tensor_value_info("v_out", TensorProto.FLOAT, None),
             helper.make_tensor_value_info("s_out", TensorProto.FLOAT, None)])
        nodes.append(helper.make_node("Loop", ["m", "c", "x"], ["v", "s"], body=body))
        outs = ["v", "s"]
        # Scan outputs are stacked, one row per iteration (ONNX operator spec, Loop; its
        # conformance model test_loop11 stacks five [1] values to [5, 1]). The reference
        # evaluator concatenates them instead, so the expected shapes are written here.
        stacked = {"same": shp, "reduced": shp[1:], "cast": []}[scan]
        spec = [shp, [trips] + stacked]
    elif k == "scan":
        # The reference evaluator scans axis 0 only.
        axis, out_axis = 0, 0
        state = [d for i, d in enumerate(shp) if i != axis]
        inits.append(numpy_helper.from_array(np.zeros(state, np.float32), "s0"))
        body = helper.make_graph(
            [helper.make_node("Add", ["s_in", "xi"], ["s_out"]),
             helper.make_node("Identity", ["s_out"], ["y_out"])], "body",
            [helper.make_tensor_value_info("s_in", TensorProto.FLOAT, state),
             helper.make_tensor_value_info("xi", TensorProto.FLOAT, state)],
            [helper.make_tensor_value_info("s_out", TensorProto.FLOAT, state),
             helper.make_tensor_value_info("y_out", TensorProto.FLOAT, state)])
        nodes.append(helper.make_node("Scan", ["s0", "x"], ["s", "y"], body=body, num_scan_inputs=1,
                                      scan_input_axes=[axis], scan_output_axes=[out_axis]))
        outs = ["s", "y"]
    elif k == "if":
        inits.append(numpy_helper.from_array(np.array(R.random() < 0.5), "c"))
        def branch(name, op):
            if op == "flat":
                n = [helper.make_node("Flatten", ["x"], [name + "_y"], axis=R.randint(0, len(shp)))]
            elif op == "twice":
                n = [helper.make_node("Concat", ["x", "x"], [name + "_y"], axis=R.randrange(len(shp)))]
            else:
                n = [helper.make_node("Neg", ["x"], [name + "_y"])]
            return helper.make_graph(n, name, [], [helper.make_tensor_value_info(name + "_y", TensorProto.FLOAT, None)])
        nodes.append(helper.make_node("If", ["c"], ["y"], then_branch=branch("then", R.choice(["flat", "twice", "neg"])),
                                      else_branch=branch("else", R.choice(["flat", "twice", "neg"]))))
        outs = ["y"]
    else:
        axis = R.randrange(len(shp))
        keep = R.randint(0, 1)
        ins = ["x"]
        if R.random() < 0.5 and shp[axis] > 1:
            cut = R.randint(1, shp[axis] - 1)
            inits.append(numpy_helper.from_array(i64([cut, shp[axis] - cut]), "parts"))
            ins.append("parts")
            keep = 1
        nodes.append(helper.make_node("SplitToSequence", ins, ["q"], axis=axis, keepdims=keep))
        nodes.append(helper.make_node("ConcatFromSequence", ["q"], ["y"], axis=R.randint(0, len(shp) - 1 + (1 - keep)),
                                      new_axis=1 - keep if len(ins) == 1 else 0))
        inits.append(numpy_helper.from_array(i64(0), "zero"))
        nodes.append(helper.make_node("SequenceAt", ["q", "zero"], ["z"]))
        outs = ["y", "z"]
    gout = [helper.make_tensor_value_info(o, TensorProto.FLOAT, None) for o in outs]
    m = helper.make_model(helper.make_graph(nodes, "g", [xin], gout, inits), opset_imports=[helper.make_opsetid("", 18)])
    m.ir_version = 9
    return m, {"x": x}, spec



def evaluated(m, feeds, names=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return ReferenceEvaluator(m).run(names, feeds)


def inferred(m, names=None):
    """onnx shape inference's shapes of the named tensors (default: the outputs), None per
    dim or tensor it leaves open, with the declared output shapes removed first."""
    m = onnx.ModelProto.FromString(m.SerializeToString())
    for o in m.graph.output:
        o.type.tensor_type.ClearField("shape")
    names = names or [o.name for o in m.graph.output]
    try:
        i = onnx.shape_inference.infer_shapes(m, strict_mode=True, data_prop=True)
    except Exception:
        return "refused"
    found = {v.name: v for v in list(i.graph.value_info) + list(i.graph.output)}
    return [[d.dim_value if d.HasField("dim_value") else None for d in found[n].type.tensor_type.shape.dim]
            if n in found and found[n].type.tensor_type.HasField("shape") else None for n in names]


def settled(ref, inf):
    """Whether the references agree. Shape inference refusing the model (in strict mode: a
    window wider than its input somewhere in a chain, say) counts as disagreeing: the
    evaluator's numpy runs such windows and returns sizes the specification does not give."""
    if any(0 in r for r in ref) or inf == "refused":
        return False
    return all(i is None or None in i or i == r for r, i in zip(ref, inf))


def spec_text(g, types):
    """Output shapes the operator specification's text gives where both references deviate
    from it: a pool with auto_pad SAME_UPPER or SAME_LOWER and ceil_mode is ceil(in / stride)
    per spatial axis (ONNX operator spec, MaxPool / AveragePool / LpPool, "auto_pad ... the
    output spatial shape will be following when ceil_mode is enabled")."""
    a = g.attrs
    if g.op in ("MaxPool", "AveragePool", "LpPool") and a.get("ceil_mode") and a.get("auto_pad", "").startswith("SAME"):
        x = list(next(iter(g.feeds.values())).shape)
        st = a.get("strides", [1] * (len(x) - 2))
        out = x[:2] + [-(-i // s) for i, s in zip(x[2:], st)]
        return [[[out, t] for t in types]]
    return []


cases = []
skipped = {"left out: invalid, refused or empty": 0, "left out: chain the references disagree on": 0,
           "left out: control flow the references disagree on": 0,
           "checked against either: single op the references disagree on": 0}
for n in range(SINGLES):
    g = SINGLE[R.randrange(len(SINGLE))]()
    try:
        outs = evaluated(g.build(), g.feeds)
        ref = [list(np.asarray(o).shape) for o in outs]
        m = g.build([helper.np_dtype_to_tensor_dtype(np.asarray(o).dtype) for o in outs], [len(r) for r in ref])
        onnx.checker.check_model(m)
    except Exception:
        skipped["left out: invalid, refused or empty"] += 1
        continue
    types = [np.asarray(o).dtype.name for o in outs]
    case = {"file": f"single{n:04}_{g.op}.onnx", "dims": {}, "outputs": [[r, t] for r, t in zip(ref, types)]}
    inf = inferred(m)
    if not settled(ref, inf):
        if inf == "refused" or any(0 in r for r in ref) or any(i is None or None in i for i in inf):
            skipped["left out: invalid, refused or empty"] += 1
            continue
        # The references disagree on a model both accept: tilecut must give one of their
        # answers, or the specification text's where that settles the case and both deviate.
        skipped["checked against either: single op the references disagree on"] += 1
        case["alternatives"] = [[[i, t] for i, t in zip(inf, types)]] + spec_text(g, types)
    onnx.save(m, os.path.join(OUT, case["file"]))
    cases.append(case)

def chains(prefix, count, draw_input, feature_axis, sizes, step_fn):
    """`count` random chains of `step_fn` from x of a shape `draw_input` draws (numbers and
    symbol names), each case at two sizes drawn from `sizes` (symbol -> (lo, hi))."""
    for n in range(count):
        b = B()
        first = draw_input()
        x, feat = "x", first[feature_axis]
        for _ in range(R.randint(2, 7)):
            nx, nf = step_fn(b, x, feat)
            last = b.nodes[-1] if b.nodes else None
            if last is not None and last.op_type == "Concat" and list(last.input) == [x, x]:
                ax = [a.i for a in last.attribute if a.name == "axis"][0]
                nf = 2 * feat if ax == 1 else feat
            x, feat = nx, nf
        if x == "x":
            continue
        gout = [helper.make_tensor_value_info(x, TensorProto.FLOAT, None)]

        def model(values):
            dims = [values.get(d, d) if isinstance(d, str) else d for d in first]
            gin = [helper.make_tensor_value_info("x", TensorProto.FLOAT, dims)]
            m = helper.make_model(helper.make_graph(b.nodes, "g", gin, gout, b.inits),
                                  opset_imports=[helper.make_opsetid("", 18)])
            m.ir_version = 9
            return m
        name = f"{prefix}{n:04}.onnx"
        wrote = False
        for _ in range(2):
            values = {k: R.randint(lo, hi) for k, (lo, hi) in sizes.items()}
            # Every tensor of the chain, not only its output: a window wider than its input
            # or a slice left empty midway is outside the specification, and the evaluator's
            # numpy still returns sizes from there on that shape inference does not give.
            m = model(values)
            names = [o for nd in m.graph.node for o in nd.output]
            shape = [values.get(d, d) if isinstance(d, str) else d for d in first]
            try:
                ref = [list(np.asarray(t).shape) for t in evaluated(m, {"x": np.zeros(shape, np.float32)}, names)]
            except Exception:
                skipped["left out: invalid, refused or empty"] += 1
                continue
            if not settled(ref, inferred(m, names)):
                skipped["left out: chain the references disagree on"] += 1
                continue
            if not wrote:
                onnx.save(model({}), os.path.join(OUT, name))
                wrote = True
            cases.append({"file": name, "dims": values, "outputs": [[ref[names.index(x)], "float32"]]})


for n in range(CHAINS):
    m, feeds, spec = control()
    try:
        outs = evaluated(m, feeds)
        # The checker wants a shape on each graph output: symbolic dims of the rank found.
        for o, t in zip(m.graph.output, outs):
            o.CopyFrom(helper.make_tensor_value_info(o.name, TensorProto.FLOAT, [f"{o.name}{i}" for i in range(np.ndim(t))]))
        onnx.checker.check_model(m)
    except Exception:
        skipped["left out: invalid, refused or empty"] += 1
        continue
    ref = spec or [list(np.asarray(o).shape) for o in outs]
    if not settled(ref, inferred(m)):
        skipped["left out: control flow the references disagree on"] += 1
        continue
    name = f"control{n:04}_{m.graph.node[0].op_type}.onnx"
    onnx.save(m, os.path.join(OUT, name))
    cases.append({"file": name, "dims": {}, "outputs": [[r, np.asarray(o).dtype.name] for r, o in zip(ref, outs)]})

# Image chains: x[1, C, H, W]; sequence chains: x[B, S, D], as transformer and audio
# encoders take them.
chains("chain", CHAINS, lambda: [1, R.randint(1, 3), "H", "W"], 1, {"H": (4, 24), "W": (4, 24)}, step)
chains("seq", CHAINS, lambda: ["B", "S", R.choice([4, 8, 12])], 2, {"B": (1, 3), "S": (2, 20)}, seq_step)

print(json.dumps({"cases": cases, "counts": skipped}))
