"""Read and validate a study codebook (the YAML contract described in docs/codebook.md).

Every error names the key path and what is wrong, e.g.
``metrics.satisfied.share: code 7 is not a code of satisfaction``.
"""

from __future__ import annotations

import hashlib
import math
import re
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from .errors import TrackerError

TYPES = ("category", "scale", "number", "multi", "text")
LABEL_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,39}")  # always used with fullmatch


_Base: Any = getattr(yaml, "CSafeLoader", yaml.SafeLoader)  # libyaml's parser when PyYAML has it: 10x faster


class _Loader(_Base):  # type: ignore[misc]  # a base chosen at import time
    """SafeLoader that keeps dates as text and only true/false as booleans.

    Wave labels such as ``2025-09-30`` must stay the text written, and a code label such
    as ``No`` or ``On`` must not turn into a boolean (YAML 1.1 would do both).
    """


_Loader.yaml_implicit_resolvers = {
    key: [(tag, rx) for tag, rx in resolvers if tag not in ("tag:yaml.org,2002:timestamp", "tag:yaml.org,2002:bool")]
    for key, resolvers in _Base.yaml_implicit_resolvers.items()
}
_Loader.add_implicit_resolver(
    "tag:yaml.org,2002:bool", re.compile(r"^(?:true|True|TRUE|false|False|FALSE)$"), list("tTfF")
)


def _construct_mapping_once(loader, node, deep=False):
    """A mapping whose keys are all different: YAML would silently keep the last of two."""
    seen: dict = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=True)
        try:
            hash(key)
        except TypeError:
            raise yaml.constructor.ConstructorError(None, None, "a key must be a plain value", key_node.start_mark)
        if key in seen:
            raise TrackerError(f"codebook: key {key!r} is given twice in one mapping (lines {seen[key] + 1} and "
                               f"{key_node.start_mark.line + 1}); YAML would silently keep only the second")
        seen[key] = key_node.start_mark.line
    return _Base.construct_mapping(loader, node, deep=deep)


_Loader.add_constructor("tag:yaml.org,2002:map", lambda loader, node: _construct_mapping_once(loader, node, deep=True))

#: Limits checked on the YAML event stream before anything is built, so that a hostile or
#: broken codebook cannot exhaust the stack or the memory (PyYAML builds nodes recursively,
#: and aliases can multiply a document's size).
MAX_BYTES = 2_000_000
MAX_DEPTH = 32
MAX_ALIASES = 500
#: Values the document holds once every alias is written out ("billion laughs": a few
#: aliases of aliases expand to millions of values when a message or a loop walks them).
MAX_VALUES = 200_000


def _guard(text: str, name: str) -> None:
    if len(text.encode("utf-8")) > MAX_BYTES:
        raise TrackerError(f"codebook: {name}: larger than {MAX_BYTES // 1_000_000} MB; is this the codebook?")
    depth = aliases = values = 0
    opened: list[tuple[str | None, int]] = []  # (anchor, values before it) of each open collection
    size: dict[str, int] = {}  # values each anchor stands for, aliases written out
    try:
        for event in yaml.parse(text, Loader=_Loader):
            if isinstance(event, yaml.ScalarEvent):
                values += 1
                if event.anchor:
                    size[event.anchor] = 1
            elif isinstance(event, (yaml.MappingStartEvent, yaml.SequenceStartEvent)):
                values += 1
                opened.append((event.anchor, values))
                depth += 1
                if depth > MAX_DEPTH:
                    line = event.start_mark.line + 1
                    raise TrackerError(f"codebook: {name}: nested more than {MAX_DEPTH} levels deep at line {line}")
            elif isinstance(event, (yaml.MappingEndEvent, yaml.SequenceEndEvent)):
                depth -= 1
                anchor, before = opened.pop()
                if anchor:
                    size[anchor] = values - before + 1
            elif isinstance(event, yaml.AliasEvent):
                values += size.get(event.anchor, 1)
                aliases += 1
                if aliases > MAX_ALIASES:
                    raise TrackerError(f"codebook: {name}: more than {MAX_ALIASES} aliases (*name); write the "
                                       f"codebook out plainly")
            if values > MAX_VALUES:
                raise TrackerError(f"codebook: {name}: its aliases (*name) expand to more than {MAX_VALUES:,} values "
                                   f"at line {event.start_mark.line + 1}; write the codebook out plainly")
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        if "nesting depth" in str(exc) and mark is not None:  # libyaml stops at its own limit first
            raise TrackerError(f"codebook: {name}: nested more than {MAX_DEPTH} levels deep at line "
                               f"{mark.line + 1}") from None
        return  # the load reports where the YAML is broken


def _schema() -> dict:
    import json
    from importlib.resources import files

    return json.loads(files("tracker").joinpath("codebook.schema.json").read_text(encoding="utf-8"))


def _keys(schema: dict, ref: str | None = None) -> tuple[str, ...]:
    node = schema if ref is None else schema["$defs"][ref]
    return tuple(node["properties"])


def _unknown_keys(doc: dict) -> None:
    """Refuse keys the schema (tracker/codebook.schema.json) does not know, suggesting the
    nearest known spelling: a misspelt ``weight`` would otherwise leave a study unweighted."""
    import difflib

    schema = _schema()

    def check(node, allowed, path):
        if not isinstance(node, dict):
            return
        for key in node:
            if str(key) not in allowed:
                near = difflib.get_close_matches(str(key), allowed, n=1, cutoff=0.6)
                hint = f"; did you mean {near[0]!r}?" if near else f" (known here: {', '.join(allowed)})"
                raise _err(f"{path}{key}", f"unknown key{hint}")

    check(doc, _keys(schema), "")
    for section, ref in (("variables", "variable"), ("groups", "group"), ("metrics", "metric")):
        for name, node in (doc.get(section) or {}).items() if isinstance(doc.get(section), dict) else ():
            check(node, _keys(schema, ref), f"{section}.{name}.")
            if ref == "variable" and isinstance(node, dict):
                for i, rc in enumerate(node.get("recode") or [] if isinstance(node.get("recode"), list) else []):
                    check(rc, ("waves", "map"), f"{section}.{name}.recode[{i}].")
            if ref == "metric" and isinstance(node, dict):
                check(node.get("balance"), ("plus", "minus"), f"{section}.{name}.balance.")
                check(node.get("base"), ("variable", "codes"), f"{section}.{name}.base.")
    check(doc.get("rake"), tuple(schema["properties"]["rake"]["properties"]), "rake.")
    check(doc.get("drivers"), tuple(schema["properties"]["drivers"]["properties"]), "drivers.")
    check(doc.get("replicates"), tuple(schema["properties"]["replicates"]["properties"]), "replicates.")


@dataclass(frozen=True)
class Recode:
    waves: tuple[str, ...]
    map: dict[float, float]


@dataclass(frozen=True)
class Variable:
    name: str
    label: str
    type: str
    codes: dict[float, str] = field(default_factory=dict)
    missing: dict[float, str] = field(default_factory=dict)
    options: dict[str, str] = field(default_factory=dict)
    range: tuple[float, float] | None = None
    aliases: tuple[str, ...] = ()
    recode: tuple[Recode, ...] = ()
    break_before: str | None = None
    first_wave: str | None = None
    last_wave: str | None = None

    def code_label(self, code: float) -> str:
        return self.codes.get(code, self.missing.get(code, _fmt_code(code)))


@dataclass(frozen=True)
class Group:
    """A subgroup split: ``levels`` maps each label to the codes (or closed band) it holds."""

    name: str
    variable: str
    levels: dict[str, tuple[float, ...]] = field(default_factory=dict)
    bands: dict[str, tuple[float, float]] | None = None


@dataclass(frozen=True)
class Metric:
    name: str
    label: str
    variable: str
    kind: str  # share | mean | balance
    codes: tuple = ()  # share codes (or option columns for multi)
    plus: tuple = ()
    minus: tuple = ()
    base_variable: str | None = None
    base_codes: tuple = ()
    smallest_change: float | None = None  # the smallest change that matters, in the units shown


#: Each replicate method's variance multiplier and per-replicate scales, as R's svrepdesign
#: sets them by type (Lumley 2010, *Complex Surveys*, ch. 2.7; Wolter 2007, ch. 3-4): R
#: replicates; Fay's rho; JKn needs its rscales (n_h - 1) / n_h given.
REPLICATE_SCALE = {"jk1": lambda r, rho: (r - 1) / r, "brr": lambda r, rho: 1 / r,
                   "fay": lambda r, rho: 1 / (r * (1 - rho) ** 2), "bootstrap": lambda r, rho: 1 / (r - 1),
                   "sdr": lambda r, rho: 4 / r, "jkn": lambda r, rho: 1.0}


@dataclass(frozen=True)
class Replicates:
    """Replicate weight columns and how their spread makes a variance:
    V = scale * sum_r rscales_r (theta_r - centre)^2, the centre the full-sample estimate
    (``mse``) or the replicates' mean."""

    columns: tuple[str, ...]
    method: str
    scale: float
    rscales: tuple[float, ...]
    mse: bool


@dataclass(frozen=True)
class Codebook:
    title: str
    id: str
    weight: str | None
    strata: str | None
    clusters: str | None
    variables: dict[str, Variable]
    groups: dict[str, Group]
    metrics: dict[str, Metric]
    profile: tuple[str, ...]
    targets: dict[str, dict[str, float]]
    rake: dict[str, Any]
    source: str  # the YAML text as given
    sha256: str
    single_cluster_rule: str = "centre"  # key single_cluster_strata (tracker.methods.SINGLE_CLUSTER_RULES)
    # a cluster label names the same cluster in every wave: only when the codebook says so
    # (None: not said, taken as no; docs/validation.md, independent clusters under reused labels)
    waves_share_clusters: bool | None = None
    panel: bool = False  # an id names the same person in every wave (a panel): only when said
    # key population: per stratum label (or "" without strata) the PSUs of the population, or
    # a sampling fraction below 1: the finite population correction (None: none)
    population: dict[str, float] | None = None
    # key weights_raked_to: groups whose margins the delivered weights were raked to
    raked_to: tuple[str, ...] = ()
    # key smallest_change at the top: the study's default per metric kind, in the units shown
    # (a metric's own smallest_change wins); none declared, no 'held' or 'flat' is ever said
    smallest_change: dict[str, float] = field(default_factory=dict)
    # key drivers: {"headline": metric, "attributes": (metrics...)} for the driver analysis
    drivers: dict[str, Any] = field(default_factory=dict)
    # key replicates: the replicate weights that carry the design (Replicates), or None
    replicates: Replicates | None = None
    # key seasons: the seasonal cycle (12 monthly, 4 quarterly) of expected ranges and slopes, or None
    seasons: int | None = None

    def design_columns(self) -> list[str]:
        reps = list(self.replicates.columns) if self.replicates else []
        return [c for c in (self.id, self.weight, self.strata, self.clusters) if c] + reps

    def column_for(self, variable: str) -> list[str]:
        """The stored column(s) of a variable (one per option for multi)."""
        v = self.variables[variable]
        return list(v.options) if v.type == "multi" else [v.name]


def _fmt_code(code: float) -> str:
    return str(int(code)) if float(code).is_integer() else str(code)


def _err(path: str, msg: str) -> TrackerError:
    return TrackerError(f"codebook: {shorten(path, 120)}: {shorten(msg, 600)}")


def _as_code(value: Any, path: str) -> float:
    if isinstance(value, bool):
        raise _err(path, f"code {value!r} is not a number")
    try:
        code = float(value)
    except (TypeError, ValueError):
        raise _err(path, f"code {value!r} is not a number") from None
    if not math.isfinite(code) or not code.is_integer():
        raise _err(path, f"code {value!r} is not a whole number")
    return code


def _mapping(node: Any, path: str, required: bool = True) -> dict:
    if node is None and not required:
        return {}
    if not isinstance(node, dict):
        raise _err(path, f"expected a mapping (key: value), got {type(node).__name__}")
    return node


def _text(node: Any, path: str) -> str:
    if node is None or isinstance(node, (dict, list)):
        raise _err(path, "expected a text value")
    text = str(node)
    bad = next((c for c in text if unicodedata.category(c) == "Cc"), None)
    if bad is not None:  # NUL, escape sequences and the like would reach files, pages and terminals
        raise _err(path, f"holds the control character U+{ord(bad):04X}; labels and names are plain text")
    return text


def shorten(text: str, width: int = 80) -> str:
    """``text`` in at most ``width`` characters for a message: its middle cut out (an
    ellipsis says where), so that both how it starts and how it ends stay readable."""
    if len(text) <= width:
        return text
    head = (width - 3) * 2 // 3
    return text[:head] + "..." + text[len(text) - (width - 3 - head):]


#: Bounds of the codebook's rake settings: a tolerance below 1e-12 is beyond double
#: precision for margins summing to 1, and more rounds than this never help.
RAKE_TOLERANCE = (1e-12, 0.01)
RAKE_ROUNDS = (1, 10_000)


def parse_cap(text: str) -> tuple[float, float]:
    """'0.2:5' -> (0.2, 5.0)."""
    try:
        lo, hi = (float(x) for x in str(text).split(":"))
    except ValueError:
        raise TrackerError(f"cap {shorten(str(text))!r}: write it as LOW:HIGH, for example 0.2:5") from None
    if not (0 < lo < 1 < hi < math.inf):
        raise TrackerError(f"cap {shorten(str(text))!r}: LOW must be between 0 and 1 and HIGH above 1")
    return lo, hi


def _parse_rake(node: Any) -> dict[str, Any]:
    """The rake settings, each of its own type and within its bounds (a quoted 'false' is
    text, not a boolean: refused rather than read as true)."""
    rake = dict(_mapping(node, "rake", required=False))
    if "always" in rake and not isinstance(rake["always"], bool):
        raise _err("rake.always", f"{shorten(repr(rake['always']))}: write true or false, without quotes")
    if "cap" in rake:
        try:
            rake["cap"] = parse_cap(rake["cap"] if isinstance(rake["cap"], str) else repr(rake["cap"]))
        except TrackerError as exc:
            raise _err("rake.cap", str(exc)) from None
    lo, hi = RAKE_TOLERANCE
    tol = rake.get("tolerance", 1e-8)
    if isinstance(tol, bool) or not isinstance(tol, (int, float)) or not lo <= tol <= hi:
        raise _err("rake.tolerance", f"{shorten(repr(tol))}: give a number from {lo:g} to {hi:g}")
    lo, hi = RAKE_ROUNDS
    rounds = rake.get("max_rounds", 1000)
    if isinstance(rounds, float) and rounds.is_integer():
        rounds = int(rounds)
    if isinstance(rounds, bool) or not isinstance(rounds, int) or not lo <= rounds <= hi:
        raise _err("rake.max_rounds", f"{shorten(repr(rounds))}: give a whole number from {lo:,} to {hi:,}")
    return rake


def _code_map(node: Any, path: str) -> dict[float, str]:
    out: dict[float, str] = {}
    for key, label in _mapping(node, path).items():
        code = _as_code(key, f"{path}.{key}")
        if code in out:
            raise _err(path, f"code {_fmt_code(code)} is given twice")
        out[code] = _text(label, f"{path}.{key}")
    return out


def _wave_label(node: Any, path: str) -> str:
    label = _text(node, path)
    if not LABEL_RE.fullmatch(label):
        raise _err(path, f"{label!r} is not a valid wave label (letters, digits, '.', '_', '-'; at most 40)")
    return label


def load_codebook(path: str | Path) -> Codebook:
    """Read ``path`` and return a validated :class:`Codebook`, or raise TrackerError."""
    from .limits import regular_file

    path = Path(path)
    try:  # by type and size before a byte is read: a pipe would hang, /dev/zero never ends
        if regular_file(path, "a codebook", 1 << 62).st_size > MAX_BYTES:
            raise TrackerError(f"{path}: larger than {MAX_BYTES // 1_000_000} MB; is this the codebook?")
        text = path.read_text(encoding="utf-8-sig")
    except TrackerError as exc:
        raise TrackerError(f"codebook: {exc}") from None
    except FileNotFoundError:
        raise TrackerError(f"codebook: {path}: file not found") from None
    except UnicodeDecodeError as exc:
        raise TrackerError(f"codebook: {path}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    return parse_codebook(text, str(path))


def parse_codebook(text: str, name: str = "codebook.yaml") -> Codebook:
    """The codebook in ``text`` (docs/codebook.md), every rule checked; a TrackerError names
    the key and what is wrong. The parts: the YAML (:func:`_load_yaml`), the design keys,
    the variables and the columns they own (:func:`_owned_columns`), groups, metrics,
    targets (:func:`_parse_targets`), the settings, and one form for every wave label named
    (:func:`_one_label_form`)."""
    doc = _load_yaml(text, name)
    for key in ("title", "id", "variables", "metrics"):
        if key not in doc:
            raise _err(key, "is required")
    title = _text(doc["title"], "title")
    id_col = _text(doc["id"], "id")
    weight, strata, clusters = (_text(doc[k], k) if doc.get(k) is not None else None
                                for k in ("weight", "strata", "clusters"))
    variables = {str(vname): _parse_variable(str(vname), node)
                 for vname, node in _mapping(doc["variables"], "variables").items()}
    if not variables:
        raise _err("variables", "no variables are declared")
    _owned_columns(variables, id_col, weight, strata, clusters)
    groups = {str(gname): _parse_group(str(gname), node, variables, {strata: "strata", clusters: "clusters"})
              for gname, node in _mapping(doc.get("groups"), "groups", required=False).items()}
    metrics = {str(mname): _parse_metric(str(mname), node, variables)
               for mname, node in _mapping(doc["metrics"], "metrics").items()}
    if not metrics:
        raise _err("metrics", "no metrics are declared")
    single_rule, share_clusters, panel = _design_options(doc)
    book = Codebook(
        title=title, id=id_col, weight=weight, strata=strata, clusters=clusters,
        variables=variables, groups=groups, metrics=metrics, profile=_group_list(doc, "profile", groups),
        targets=_parse_targets(doc.get("targets"), groups), rake=dict(_parse_rake(doc.get("rake"))), source=text,
        sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
        single_cluster_rule=single_rule, waves_share_clusters=share_clusters, panel=panel,
        population=_parse_population(doc.get("population"), strata),
        raked_to=_group_list(doc, "weights_raked_to", groups),
        smallest_change=_parse_smallest_defaults(doc.get("smallest_change")),
        drivers=_parse_drivers(doc.get("drivers"), metrics),
        replicates=_parse_replicates(doc.get("replicates"), doc),
        seasons=_parse_seasons(doc.get("seasons")),
    )
    _one_label_form(book)
    return book


def _load_yaml(text: str, name: str) -> dict:
    """The codebook's YAML as a mapping with only known top-level keys; broken YAML named by
    its line and column."""
    _guard(text, name)
    try:
        doc = yaml.load(text, Loader=_Loader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"line {mark.line + 1}, column {mark.column + 1}" if mark else "unknown place"
        raise TrackerError(f"codebook: {name}: broken YAML at {where}: {exc.problem or exc}") from None
    except yaml.YAMLError as exc:
        raise TrackerError(f"codebook: {name}: broken YAML: {exc}") from None
    if not isinstance(doc, dict):
        raise TrackerError(f"codebook: {name}: expected a mapping at the top level")
    _unknown_keys(doc)
    return doc


def _owned_columns(variables: dict, id_col: str, weight: str | None, strata: str | None,
                   clusters: str | None) -> None:
    """Each file column feeds one thing: the design columns differ, no variable reads the id
    or the weight, a design column is a variable only under its own name, no column twice."""
    design = [c for c in (id_col, weight, strata, clusters) if c]
    if len(set(design)) != len(design):
        raise _err("id", "id, weight, strata and clusters must be different columns")
    columns: dict[str, str] = {}
    for v in variables.values():
        owned = list(v.options) if v.type == "multi" else [v.name, *v.aliases]
        for col in owned:
            # strata and clusters may also be variables (results by region are a common need);
            # the id and the weight may not: they are not answers
            if col in (id_col, weight):
                raise _err(f"variables.{v.name}", f"column {col!r} is the {'id' if col == id_col else 'weight'} "
                                                  f"column and cannot also be a variable")
            if col in (strata, clusters) and col != v.name:
                raise _err(f"variables.{v.name}", f"column {col!r} is a design column; it can be a variable "
                                                  f"only under its own name, not as an alias")
            if col in columns:
                raise _err(f"variables.{v.name}", f"column {col!r} is also used by variable {columns[col]}")
            columns[col] = v.name


def _parse_targets(node: Any, groups: dict) -> dict[str, dict[str, float]]:
    """The key targets: for groups in groups, every label's population share, summing to 1."""
    targets = {}
    for gname, shares_node in _mapping(node, "targets", required=False).items():
        gname = str(gname)
        path = f"targets.{gname}"
        if gname not in groups:
            raise _err(path, f"{gname!r} is not a group in groups")
        shares = {}
        for label, share in _mapping(shares_node, path).items():
            label = str(label)
            if label not in groups[gname].levels:
                raise _err(f"{path}.{label}", f"{label!r} is not a label of group {gname}")
            if isinstance(share, bool) or not isinstance(share, (int, float)) or not 0 < share <= 1:
                raise _err(f"{path}.{label}", f"share {share!r} must be a number above 0 and at most 1")
            shares[label] = float(share)
        missing = [lab for lab in groups[gname].levels if lab not in shares]
        if missing:
            raise _err(path, f"no target for {', '.join(missing)}")
        total = sum(shares.values())
        if abs(total - 1) > 1e-6:
            raise _err(path, f"shares sum to {total:.4g}, not 1")
        targets[gname] = shares
    return targets


def _one_label_form(book: Codebook) -> None:
    """Every wave label the codebook names is written in one form."""
    refs = wave_references(book)
    if not refs:
        return
    first = refs[0]
    odd = next(((w, lab) for w, lab in refs if label_form(lab) != label_form(first[1])), None)
    if odd is not None:
        raise _err(odd[0], f"{shorten(odd[1])!r} is not written like {first[0]} ({shorten(first[1])!r}); "
                           f"every wave label the codebook names must be of one form")


def _group_list(doc: dict, key: str, groups: dict) -> tuple[str, ...]:
    """A codebook key holding a list of group names (profile, weights_raked_to), each checked."""
    node = doc.get(key) or []
    if not isinstance(node, list):
        raise _err(key, "expected a list of group names")
    names = tuple(str(g) for g in node)
    for i, g in enumerate(names):
        if g not in groups:
            raise _err(f"{key}[{i}]", f"{g!r} is not a group in groups")
    return names


def _parse_seasons(node: Any) -> int | None:
    """The key seasons: 12 (monthly waves) or 4 (quarterly)."""
    if node is None:
        return None
    if node not in (4, 12) or isinstance(node, bool):
        raise _err("seasons", f"{shorten(repr(node))}: give 12 for monthly waves or 4 for quarterly ones")
    return int(node)


def _parse_replicates(node: Any, doc: dict) -> Replicates | None:
    """The key replicates: {method: jk1|jkn|brr|fay|bootstrap|sdr, columns: [...] or prefix: P
    with count: N (columns P1..PN), fay_rho, scale, rscales, mse}. Replicate weights replace
    strata, clusters, a population, shared clusters and a panel; raking by the tool rakes every
    replicate too (tracker.weighting.rake_table)."""
    if node is None:
        return None
    if not isinstance(node, dict):
        raise _err("replicates", "write {method: jk1, columns: [...]} (or prefix: and count:)")
    for key in ("strata", "clusters", "population", "weights_raked_to"):
        if doc.get(key):
            raise _err("replicates", f"replicate weights carry the design: leave out {key}")
    if doc.get("waves_share_clusters"):
        raise _err("replicates", "replicate weights carry the design, with no clusters to share: leave out "
                                 "waves_share_clusters (a panel's waves share respondents: panel: true)")
    method = str(node.get("method"))
    if method not in REPLICATE_SCALE:
        raise _err("replicates.method", f"{shorten(repr(node.get('method')))}: give one of "
                                        f"{', '.join(REPLICATE_SCALE)}")
    if "columns" in node:
        columns = tuple(str(c) for c in node["columns"])
    elif "prefix" in node and "count" in node:
        columns = tuple(f"{node['prefix']}{k}" for k in range(1, int(node["count"]) + 1))
    else:
        raise _err("replicates", "name the replicate weight columns: columns: [...], or prefix: and count:")
    if len(set(columns)) < len(columns) or len(columns) < 2:
        raise _err("replicates.columns", "give at least two columns, each once")
    rho = float(node.get("fay_rho", 0.0))
    if method == "fay" and not 0 < rho < 1:
        raise _err("replicates.fay_rho", "Fay's method needs its rho, between 0 and 1 (e.g. 0.5)")
    r = len(columns)
    rscales = node.get("rscales")
    if method == "jkn" and rscales is None:
        raise _err("replicates.rscales", "the JKn jackknife needs each replicate's scale, (n_h - 1) / n_h")
    if rscales is not None and len(rscales) != r:
        raise _err("replicates.rscales", f"give one scale per replicate ({r}), not {len(rscales)}")
    scale = float(node.get("scale", REPLICATE_SCALE[method](r, rho)))
    return Replicates(columns, method, scale, tuple(float(x) for x in (rscales or [1.0] * r)),
                      bool(node.get("mse", False)))


def _parse_drivers(node: Any, metrics: dict) -> dict[str, Any]:
    """The key drivers: {headline: METRIC, attributes: [METRIC, ...]}, each a declared metric,
    the headline not among its attributes, at least two attributes."""
    if node is None:
        return {}
    if not isinstance(node, dict) or "headline" not in node or "attributes" not in node:
        raise _err("drivers", "write {headline: METRIC, attributes: [METRIC, METRIC, ...]}")
    headline = str(node["headline"])
    attributes = node["attributes"]
    if headline not in metrics:
        raise _err("drivers.headline", f"{headline!r} is not a metric in metrics")
    if not isinstance(attributes, list) or len(attributes) < 2:
        raise _err("drivers.attributes", "give a list of at least two metrics")
    for i, a in enumerate(map(str, attributes)):
        if a not in metrics:
            raise _err(f"drivers.attributes[{i}]", f"{a!r} is not a metric in metrics")
        if a == headline:
            raise _err(f"drivers.attributes[{i}]", f"{a!r} is the headline; an attribute explains it")
    if len(set(map(str, attributes))) < len(attributes):
        raise _err("drivers.attributes", "a metric is listed twice")
    return {"headline": headline, "attributes": tuple(map(str, attributes))}


def _parse_smallest_defaults(node: Any) -> dict[str, float]:
    """The top-level smallest_change: {share: 3, balance: 5, mean: 0.1}, each kind's smallest
    change that matters in the units it is shown in."""
    if node is None:
        return {}
    out = {}
    for kind, value in _mapping(node, "smallest_change").items():
        kind = str(kind)
        if kind not in ("share", "mean", "balance"):
            raise _err(f"smallest_change.{kind}", f"{kind!r} is not a metric kind: give share, mean or balance")
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < math.inf:
            raise _err(f"smallest_change.{kind}", f"{value!r}: give a positive number (percentage points for a "
                                                  f"share or balance, the mean's own units for a mean)")
        out[kind] = float(value)
    return out


def stratum_key(label: Any) -> str:
    """A stratum label as the key population matches it: a whole number in one spelling
    (1, 1.0 and '1' alike: a coded stratum column is stored as numbers), anything else as
    its text."""
    text = str(label).strip()
    try:
        x = float(text)
    except ValueError:
        return text
    return str(int(x)) if math.isfinite(x) and x.is_integer() else text


def _parse_population(node: Any, strata: str | None) -> dict[str, float] | None:
    """The key population: one number (no strata) or a mapping from each stratum's label to
    its number; a number of 1 or more is the count of PSUs (clusters, or respondents when no
    clusters are declared) in the population, one between 0 and 1 the sampling fraction."""
    if node is None:
        return None
    def number(v, where):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
            raise _err(where, f"{shorten(repr(v))}: give the population count (1 or more) or the sampling fraction "
                              f"(between 0 and 1)")
        return float(v)
    if isinstance(node, dict):
        if strata is None:
            raise _err("population", "a mapping by stratum needs strata; without strata give one number")
        return {stratum_key(k): number(v, f"population.{k}") for k, v in node.items()}
    if strata is not None:
        raise _err("population", "the study has strata: give each stratum's number, as {stratum label: number}")
    return {"": number(node, "population")}


def label_form(label: str) -> str:
    """The form of a wave label, each digit written 9 and each letter A: 2025-Q1 -> 9999-A9.
    Labels of one form sort as text in the order they are written (2025-09 before 2025-10)."""
    return re.sub(r"[A-Za-z]", "A", re.sub(r"[0-9]", "9", label))


def wave_references(book: Codebook) -> list[tuple[str, str]]:
    """Every wave label the codebook names, with where: (``variables.x.break_before``, label)."""
    out = []
    for v in book.variables.values():
        for key in ("break_before", "first_wave", "last_wave"):
            if getattr(v, key) is not None:
                out.append((f"variables.{v.name}.{key}", getattr(v, key)))
        for i, rc in enumerate(v.recode):
            out += [(f"variables.{v.name}.recode[{i}].waves", w) for w in rc.waves]
    return out


def reference_problems(book: Codebook, labels: list[str], new: str | None = None) -> list[str]:
    """Codebook wave references that cannot be placed among the study's waves: a reference
    that is not a stored wave (``labels``) is ordered against the waves as text, which is only
    right between labels of one form (break_before: 2026-4 among 2026-04, 2026-05 would sort
    after every wave, and the break would silently never apply). ``new``: a wave about to be
    added, which must be of the form of every reference not yet stored."""
    open_refs = [(where, lab) for where, lab in wave_references(book) if lab not in labels]
    out = []
    if labels:
        forms = {label_form(w) for w in labels}
        shown = ", ".join(sorted(labels)[-2:])
        out += [f"codebook: {where}: {shorten(lab)!r} is not a stored wave and not of the form of this study's "
                f"wave labels (e.g. {shown}), so it cannot be placed among them; write it as the waves are labelled"
                for where, lab in open_refs if label_form(lab) not in forms]
    if new is not None and not out:
        odd = next(((w, lab) for w, lab in open_refs if lab != new and label_form(lab) != label_form(new)), None)
        if odd is not None:
            out.append(f"wave label {shorten(new)!r} is not of the form of the codebook's {odd[0]} "
                       f"({shorten(odd[1])!r}), so the two cannot be put in order; label the wave as the codebook "
                       f"writes its waves")
    return out


def _design_options(doc: dict) -> tuple[str, bool | None, bool]:
    """The keys single_cluster_strata (a rule name), waves_share_clusters and panel
    (true/false; the first None when not given)."""
    from .names import SINGLE_CLUSTER_RULES

    rule = doc.get("single_cluster_strata", "centre")
    if rule not in SINGLE_CLUSTER_RULES:
        raise _err("single_cluster_strata", f"{rule!r} is not one of {', '.join(SINGLE_CLUSTER_RULES)}")
    share = doc.get("waves_share_clusters")
    if share is not None and not isinstance(share, bool):
        raise _err("waves_share_clusters", f"{shorten(repr(share))}: write true or false, without quotes")
    panel = doc.get("panel", False)
    if not isinstance(panel, bool):
        raise _err("panel", f"{shorten(repr(panel))}: write true or false, without quotes")
    return rule, share, panel


def _parse_variable(name: str, node: Any) -> Variable:
    path = f"variables.{name}"
    node = _mapping(node, path)
    vtype = node.get("type")
    if vtype not in TYPES:
        raise _err(f"{path}.type", f"{vtype!r} is not one of {', '.join(TYPES)}")
    label = _text(node.get("label", name), f"{path}.label")
    codes = _code_map(node["codes"], f"{path}.codes") if "codes" in node else {}
    missing = _code_map(node["missing"], f"{path}.missing") if "missing" in node else {}
    if vtype in ("category", "scale") and not codes:
        raise _err(f"{path}.codes", f"a {vtype} variable needs its codes")
    if vtype not in ("category", "scale") and codes:
        raise _err(f"{path}.codes", f"a {vtype} variable has no codes")
    both = set(codes) & set(missing)
    if both:
        raise _err(f"{path}.missing", f"code {_fmt_code(min(both))} is also in codes")
    options: dict[str, str] = {}
    if vtype == "multi":
        options = {str(k): _text(v, f"{path}.options.{k}")
                   for k, v in _mapping(node.get("options"), f"{path}.options").items()}
        if not options:
            raise _err(f"{path}.options", "a multi variable needs at least one option column")
    elif "options" in node:
        raise _err(f"{path}.options", "only a multi variable has options")
    rng = None
    if "range" in node:
        if vtype != "number":
            raise _err(f"{path}.range", "only a number variable has a range")
        rng = _low_high(node["range"], f"{path}.range")
    aliases = node.get("aliases") or []
    if not isinstance(aliases, list):
        raise _err(f"{path}.aliases", "expected a list of column names")
    recodes = [_parse_recode(name, vtype, rc, f"{path}.recode[{i}]", codes, missing)
               for i, rc in enumerate(node.get("recode") or [])]
    waves = {k: _wave_label(node[k], f"{path}.{k}") if node.get(k) is not None else None
             for k in ("break_before", "first_wave", "last_wave")}
    return Variable(
        name=name, label=label, type=vtype, codes=codes, missing=missing, options=options,
        range=rng, aliases=tuple(str(a) for a in aliases), recode=tuple(recodes), **waves,
    )


def _low_high(r: Any, path: str) -> tuple[float, float]:
    """[low, high]: two finite numbers, the first not above the second."""
    if not isinstance(r, list) or len(r) != 2 or any(isinstance(x, bool) or not isinstance(x, (int, float)) for x in r):
        raise _err(path, "expected [low, high]")
    if not all(math.isfinite(x) for x in r):
        raise _err(path, f"{r}: both ends must be finite numbers (not .nan or .inf)")
    if r[0] > r[1]:
        raise _err(path, f"low {r[0]} is above high {r[1]}")
    return float(r[0]), float(r[1])


def _parse_recode(name: str, vtype: str, node: Any, rpath: str, codes: dict, missing: dict) -> Recode:
    """One recode of a category or scale variable: the waves it applies to and old -> new codes."""
    rc = _mapping(node, rpath)
    if vtype not in ("category", "scale"):
        raise _err(rpath, "only category and scale variables can be recoded")
    waves = rc.get("waves")
    if not isinstance(waves, list) or not waves:
        raise _err(f"{rpath}.waves", "expected a list of wave labels")
    mapping = {}
    for old, new in _mapping(rc.get("map"), f"{rpath}.map").items():
        new_code = _as_code(new, f"{rpath}.map.{old}")
        if new_code not in codes and new_code not in missing:
            raise _err(f"{rpath}.map.{old}", f"code {_fmt_code(new_code)} is not a code of {name}")
        mapping[_as_code(old, f"{rpath}.map.{old}")] = new_code
    return Recode(tuple(_wave_label(w, f"{rpath}.waves") for w in waves), mapping)


def _variable_of(node: dict, path: str, variables: dict[str, Variable], design: dict | None = None) -> Variable:
    vname = node.get("variable")
    if vname not in variables:
        role = (design or {}).get(vname)
        if role:
            raise _err(f"{path}.variable", f"{vname!r} is the {role} column; to break results down by it, also "
                                           f"declare it under variables (e.g. type: category with its codes)")
        raise _err(f"{path}.variable", f"{vname!r} is not a variable")
    return variables[vname]


def _parse_group(name: str, node: Any, variables: dict[str, Variable], design: dict | None = None) -> Group:
    path = f"groups.{name}"
    node = _mapping(node, path)
    var = _variable_of(node, path, variables, design)
    vname = var.name
    if "bands" in node and "merge" in node:
        raise _err(path, "give bands or merge, not both")
    if "bands" in node:
        if var.type != "number":
            raise _err(f"{path}.bands", f"{vname} is not a number variable")
        bands = _parse_bands(node["bands"], f"{path}.bands")
        return Group(name, vname, {k: () for k in bands}, bands)
    if var.type not in ("category", "scale"):
        raise _err(path, f"{vname} is a {var.type} variable: give bands (number) or use a coded variable")
    if "merge" in node:
        return Group(name, vname, _parse_merge(node["merge"], f"{path}.merge", var))
    by_label: dict[str, float] = {}
    for code, label in var.codes.items():
        if label in by_label:  # one of the two would silently leave the split
            raise _err(path, f"codes {_fmt_code(by_label[label])} and {_fmt_code(code)} of {vname} share the label "
                             f"{shorten(label)!r}; a subgroup needs labels of its own (or put the codes together "
                             f"with merge: {{{shorten(label, 40)}: "
                             f"[{_fmt_code(by_label[label])}, {_fmt_code(code)}]}})")
        by_label[label] = code
    return Group(name, vname, {label: (code,) for code, label in var.codes.items()})


def _parse_bands(node: Any, path: str) -> dict[str, tuple[float, float]]:
    """Bands of a number variable: label -> [low, high], no two overlapping."""
    bands: dict[str, tuple[float, float]] = {}
    for label, rng in _mapping(node, path).items():
        bpath = f"{path}.{label}"
        low, high = _low_high(rng, bpath)
        for other, (lo, hi) in bands.items():
            if low <= hi and lo <= high:
                raise _err(bpath, f"band [{rng[0]}, {rng[1]}] overlaps band {other} [{lo:g}, {hi:g}]")
        bands[str(label)] = (low, high)
    return bands


def _parse_merge(node: Any, path: str, var: Variable) -> dict[str, tuple[float, ...]]:
    """Merged codes: label -> the variable's codes it holds, each code in one label."""
    levels: dict[str, tuple[float, ...]] = {}
    seen: dict[float, str] = {}
    for label, codes in _mapping(node, path).items():
        mpath = f"{path}.{label}"
        if not isinstance(codes, list) or not codes:
            raise _err(mpath, "expected a list of codes")
        cl = tuple(_as_code(c, mpath) for c in codes)
        for c in cl:
            if c not in var.codes:
                raise _err(mpath, f"code {_fmt_code(c)} is not a code of {var.name}")
            if c in seen:
                raise _err(mpath, f"code {_fmt_code(c)} is already in {seen[c]}")
            seen[c] = str(label)
        levels[str(label)] = cl
    return levels


def _codes_of(var: Variable, node: Any, path: str) -> tuple:
    if not isinstance(node, list) or not node:
        raise _err(path, "expected a list of codes")
    if var.type == "multi":
        columns: list[str] = []
        for c in node:
            if str(c) not in var.options:
                raise _err(path, f"{c!r} is not an option column of {var.name}")
            columns.append(str(c))
        return tuple(columns)
    codes: list[float] = []
    for c in node:
        code = _as_code(c, path)
        if code not in var.codes:
            raise _err(path, f"code {_fmt_code(code)} is not a code of {var.name}")
        codes.append(code)
    return tuple(codes)


def _parse_metric(name: str, node: Any, variables: dict[str, Variable]) -> Metric:
    path = f"metrics.{name}"
    node = _mapping(node, path)
    var = _variable_of(node, path, variables)
    vname = var.name
    kinds = [k for k in ("share", "mean", "balance") if k in node]
    if len(kinds) != 1:
        raise _err(path, "give exactly one of share, mean, balance")
    kind = kinds[0]
    label = _text(node.get("label", name), f"{path}.label")
    codes: tuple = ()
    plus: tuple = ()
    minus: tuple = ()
    if kind == "share":
        if var.type not in ("category", "scale", "multi"):
            raise _err(f"{path}.share", f"{vname} is a {var.type} variable; a share needs codes or options")
        codes = _codes_of(var, node["share"], f"{path}.share")
    elif kind == "mean":
        if node["mean"] is not True:
            raise _err(f"{path}.mean", "write mean: true")
        if var.type not in ("scale", "number"):
            raise _err(f"{path}.mean", f"{vname} is a {var.type} variable; a mean needs a scale or number")
    else:
        if var.type not in ("category", "scale"):
            raise _err(f"{path}.balance", f"{vname} is a {var.type} variable; a balance needs codes")
        bal = _mapping(node["balance"], f"{path}.balance")
        if "plus" not in bal or "minus" not in bal:
            raise _err(f"{path}.balance", "needs plus and minus")
        plus = _codes_of(var, bal["plus"], f"{path}.balance.plus")
        minus = _codes_of(var, bal["minus"], f"{path}.balance.minus")
        if set(plus) & set(minus):
            raise _err(f"{path}.balance", "a code is in both plus and minus")
    base_var = None
    base_codes: tuple = ()
    if "base" in node:
        base = _mapping(node["base"], f"{path}.base")
        bv = base.get("variable")
        if bv not in variables:
            raise _err(f"{path}.base.variable", f"{bv!r} is not a variable")
        if variables[bv].type not in ("category", "scale", "multi"):
            raise _err(f"{path}.base.variable", f"{bv} is a {variables[bv].type} variable; a base needs codes")
        base_var = bv
        base_codes = _codes_of(variables[bv], base.get("codes"), f"{path}.base.codes")
    smallest = node.get("smallest_change")
    if smallest is not None and (isinstance(smallest, bool) or not isinstance(smallest, (int, float))
                                 or not 0 < smallest < math.inf):
        raise _err(f"{path}.smallest_change", f"{smallest!r}: give a positive number (percentage points for a "
                                              f"share or balance, the mean's own units for a mean)")
    return Metric(name, label, vname, kind, codes, plus, minus, base_var, base_codes,
                  None if smallest is None else float(smallest))
