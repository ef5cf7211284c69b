"""An interpreter of the campaign spec's expression language for the reference checks,
written apart from both the engine (engine/src/expr.rs) and the demo simulator
(demo/simulate.py), so that an outside check does not share their reading of a spec.

The language, as documented in expr.rs and DEVELOPERS.md: numbers, names, `pi`, `+ - * /`
(left-associative), unary minus, `^` (power, right-associative, binding tighter than
unary minus), parentheses, and calls of sin cos tan exp log sqrt abs atan atan2 tanh min
max. Python's own grammar has the same precedences once `^` is written `**` (Python's
`-a ** b` is `-(a ** b)` and `**` is right-associative), so an expression is parsed with
Python's `ast` module and only a whitelist of node kinds is accepted: anything else (an
attribute, a subscript, a keyword argument, an unknown name or function) is refused with
a message naming the expression.

Values are Python floats evaluated with the `math` module (IEEE 754 double precision), one
point at a time: no numpy, no vectorisation shared with the code under test.

An unsafe constraint is `lhs op rhs` with op one of <= >= < >; the spec takes every
constraint as a closed set (`<` as `<=`, `>` as `>=`), and so does `constraint`.
"""

import ast
import math

FUNCTIONS = {
    "sin": (math.sin, 1),
    "cos": (math.cos, 1),
    "tan": (math.tan, 1),
    "exp": (math.exp, 1),
    "log": (math.log, 1),
    "sqrt": (math.sqrt, 1),
    "abs": (abs, 1),
    "atan": (math.atan, 1),
    "atan2": (math.atan2, 2),
    "tanh": (math.tanh, 1),
    "min": (min, 2),
    "max": (max, 2),
}

_BINARY = {
    ast.Add: lambda a, b: a + b,
    ast.Sub: lambda a, b: a - b,
    ast.Mult: lambda a, b: a * b,
    ast.Div: lambda a, b: a / b,
    ast.Pow: lambda a, b: a**b,
}


class SpecExpressionError(ValueError):
    pass


def _python_source(text):
    if "**" in text:
        raise SpecExpressionError(f"'{text}': '**' is not part of the spec language (power is '^')")
    return text.strip().replace("^", "**")


def _build(node, names, text):
    """A closure env -> float for one validated AST node."""
    if isinstance(node, ast.Constant) and type(node.value) in (int, float):
        value = float(node.value)
        return lambda env: value
    if isinstance(node, ast.Name):
        if node.id in names:
            key = node.id
            return lambda env: env[key]
        if node.id == "pi":
            return lambda env: math.pi
        raise SpecExpressionError(f"'{text}': unknown name '{node.id}'")
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        inner = _build(node.operand, names, text)
        if isinstance(node.op, ast.USub):
            return lambda env: -inner(env)
        return inner
    if isinstance(node, ast.BinOp) and type(node.op) in _BINARY:
        op = _BINARY[type(node.op)]
        left, right = _build(node.left, names, text), _build(node.right, names, text)
        return lambda env: op(left(env), right(env))
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and not node.keywords:
        if node.func.id not in FUNCTIONS:
            raise SpecExpressionError(f"'{text}': unknown function '{node.func.id}'")
        fn, arity = FUNCTIONS[node.func.id]
        if len(node.args) != arity:
            raise SpecExpressionError(f"'{text}': {node.func.id} takes {arity} argument(s)")
        args = [_build(a, names, text) for a in node.args]
        if arity == 1:
            (a,) = args
            return lambda env: fn(a(env))
        a, b = args
        return lambda env: fn(a(env), b(env))
    raise SpecExpressionError(f"'{text}': '{ast.dump(node)}' is not part of the spec language")


def expression(text, names):
    """Spec expression over `names` -> function of a dict name -> float."""
    try:
        tree = ast.parse(_python_source(text), mode="eval")
    except SyntaxError as e:
        raise SpecExpressionError(f"'{text}': {e.msg}") from None
    return _build(tree.body, set(names), text)


def constraint(text, names):
    """Unsafe constraint `lhs op rhs` -> function of a dict name -> bool (closed set)."""
    try:
        tree = ast.parse(_python_source(text), mode="eval")
    except SyntaxError as e:
        raise SpecExpressionError(f"'{text}': {e.msg}") from None
    node = tree.body
    if not (isinstance(node, ast.Compare) and len(node.ops) == 1):
        raise SpecExpressionError(f"'{text}': expected one comparison lhs <= rhs or lhs >= rhs")
    lhs, rhs = _build(node.left, set(names), text), _build(node.comparators[0], set(names), text)
    op = node.ops[0]
    if isinstance(op, (ast.LtE, ast.Lt)):
        return lambda env: lhs(env) <= rhs(env)
    if isinstance(op, (ast.GtE, ast.Gt)):
        return lambda env: lhs(env) >= rhs(env)
    raise SpecExpressionError(f"'{text}': the comparison must be one of <= >= < >")


def unsafe_set(spec):
    """The spec's unsafe set (a union of conjunctions) -> function of a state dict giving
    the index of the first region that holds the state, or None."""
    states = [s["name"] for s in spec["states"]]
    regions = [[constraint(t, states) for t in conj["all"]] for conj in spec["unsafe"]]

    def region_of(env):
        for i, conj in enumerate(regions):
            if all(c(env) for c in conj):
                return i
        return None

    return region_of
