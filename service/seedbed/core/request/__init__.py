"""The request format: a network's layers, validated strictly, with defaults filled in.

A request is a JSON object:

    seed      integer 0 .. 2**63-1, or a string of 1..128 characters (hashed into a key).
              true/false are not integers here.
    dtype     float32 (default) | float64 | float16 | bfloat16
    layout    out_in (default: rows are output units) | in_out (the transpose; see tensors.py)
    layers    1 .. Limits.max_layers layer objects, in the order the signal meets them

Every layer has a unique `name` (letters, digits, ``_ . -``; starting with a letter, digit or
``_``; at most Limits.max_name_length characters) and a `kind` with its own size fields:

    dense       n_in, n_out
    conv        channels_in, channels_out, kernel (1-3 sizes), groups (1; divides both
                channel counts), transposed (false), stride (one per kernel entry; all 1s)
    embedding   vocab, dim                    (no bias)
    recurrent   cell (simple | lstm | gru), n_in, hidden, gate_order (lstm/gru only),
                forget_bias (lstm only, default 1.0)
    attention   dim, heads (heads divides dim): query/key/value/output projections
    norm        dim: a scale and (with bias) a shift vector

and these optional fields:

    activation        what follows the layer (an activation name; default linear; simple
                      recurrent cells default to tanh; lstm/gru cells have built-in gate
                      nonlinearities and take none; softmax only on output layers)
    activation_param  the activation's one parameter (leaky_relu slope, elu alpha); filled with
                      the activation's default when it takes one and none is given
    role              hidden (default) | output | residual_out (last layer of a residual branch)
    bias              whether the layer has bias tensors (default true; embedding: false only;
                      norm: whether it has a shift)
    init              override for the layer's weight tensors (see `WeightOverride`)
    bias_init         override for its bias tensors: {"method": "constant", "value": v}
    class_prior       dense/conv output layers with a bias: the prior probability pi in (0, 1)
                      of the positive class; the bias is set to log(pi/(1-pi)) (Lin et al. 2017)

Residual structure (optional on every layer; see branches.py, blocks.py and docs/depth.md):

    branch            name of the residual branch the layer belongs to (same character rules as
                      layer names; must not equal a layer name). Consecutive layers with the
                      same branch form one branch: the branch's input (the output of the layer
                      before its first layer, or the network input) is added to the output of
                      its last layer. Reusing a branch name further down is refused. The
                      branch's input and output widths must match where both are known.
    block             label of the block shorthand the layer was expanded from (set by the
                      expansion; callers may set it to group their own layers in the plan)

Block shorthands are layer kinds that `parse` expands into basic layers, so everything
after parsing sees only the six basic kinds:

    transformer_block    dim, heads, mlp_dim, norm (pre | post, default pre), activation
                         (default gelu), repeat (default 1), bias. Copy i of block "enc" is
                         norm "enc.i.attn_norm", attention "enc.i.attn" (role residual_out: its
                         output projection closes the branch), norm "enc.i.mlp_norm", dense
                         "enc.i.mlp_in" (dim -> mlp_dim, the activation) and dense
                         "enc.i.mlp_out" (mlp_dim -> dim, role residual_out), in branches
                         "enc.i.attn_branch" and "enc.i.mlp_branch". pre: each norm opens its
                         branch (x + f(norm(x))); post: each norm follows the addition, outside
                         the branch (norm(x + f(x))), order attn, attn_norm, mlp_in, mlp_out,
                         mlp_norm.
    residual_conv_block  channels, kernel, activation (default relu), norm (none, pre or post),
                         repeat, bias. Copy i of block "res" is branch "res.i.branch" of convs
                         "res.i.conv1" (the activation) and "res.i.conv2" (role residual_out);
                         with norm post: conv1, norm1 (the activation), conv2, norm2; with norm
                         pre: norm1 (the activation), conv1, norm2 (the activation), conv2.

The layer limit applies to the expanded count, computed from the shorthands' numbers before
anything is expanded.

    depth_policy      optional request-level object {"name": ..., parameters} choosing a depth-
                      or width-aware rule: fixup, skip_gate, scaled_residual, deepnorm, t_fixup,
                      width_transfer (see seedbed.core.policies). Absent: plain recommendations.

Strictness: unknown fields are refused everywhere, numbers must not be quoted, booleans are not
numbers, NaN and Infinity are refused, sizes are positive integers at most 2**31-1.

`parse.parse(data, limits)` is the entry point for untrusted input: besides the model checks
it runs the request-wide checks of checks.py (unique layer and tensor names, residual
branches, explicit values that fit the dtype, the size limits, the depth policy's fit) and
returns a `ParsedRequest` carrying the tensor slots and branches, computed once. Validating
`NetworkRequest` directly skips those checks; do not serve a request that did not go through
`parse`.

`network.canonical_request(request)` gives the JSON-ready form with every default filled and keys
sorted: two requests that mean the same thing have the same canonical form, which is what
ETags and caches key on.

Modules, leaves first (each imports only those above it; a test walks the import graph):

    problems.py       Problem / RequestRejected, pydantic errors translated into them
    limits.py         Limits and the raw layer-count check (before any model runs)
    vocabulary.py     dtypes, layouts, roles, methods, dtype ranges, gate orders
    fields.py         StrictModel, sizes, gains, name and activation checks
    overrides.py      WeightOverride, BiasOverride
    layers.py         the six basic layer models
    blocks.py         block shorthands, their expansion, problems pointed back at blocks
    policy_models.py  the depth/width policy models (their effects: seedbed.core.policies)
    network.py        NetworkRequest, canonical_request
    branches.py       residual branches and their checks
    names.py          layer-name uniqueness
    parsed.py         ParsedRequest: request + slots + branches
    checks.py         the request-wide checks parse runs (add new ones here)
    parse.py          parse(): the only way untrusted input becomes a ParsedRequest

The package's __init__ imports nothing, so importing a leaf never drags in the rest.
"""
