"""Questions over pub/sub: the request/reply protocol, its JSON Schema, lobby splits.

A client publishes one JSON object on the space's request channel
(``{sr:duel}:q``) and listens on the ``reply_to`` channel it named; the reply
carries the same ``id``. Kinds:

* ``pairing`` - ``first``, ``second`` (entity id lists), optional ``context``:
  reply ``p_first_wins``, ``p_draw`` (``null`` when the model has no draws),
  ``seen`` (matches learned per entity), ``model_version`` (last applied stream id).
* ``lobby`` - ``entities`` and ``team_sizes`` ``[a, b]`` with ``a + b`` equal to the
  number of entities: reply the pairwise matrix ``matrix[i][j]`` = P(i beats j,
  i listed first; 0.5 on the diagonal) and the ``split`` into teams of those sizes whose
  predicted outcome is closest to even, with its probability.
* ``watch`` - ``watcher`` (an id the client picks), ``action`` ``set`` / ``add`` /
  ``renew`` / ``clear``, ``pairings`` and optional ``ttl_s``: the live feed then
  publishes fresh odds of those pairings on the watcher's own channel, named in
  the reply as ``live_channel`` (see :mod:`streamrate.serve.livefeed`). The watch ends
  ``ttl_s`` seconds after the watcher's last watch request unless renewed.
* ``promote`` - ``model``: the member of a challenger set (model ``challengers``,
  :mod:`streamrate.challengers`) that answers from now on; reply ``previous``.
  Pairing and lobby replies of a challenger set name the member in ``answered_by``.
* ``compare`` - optional ``reference`` member: reply the side-by-side table of
  the members over the recent window (``members``: per label n, log loss, Brier,
  ECE, accuracy and the paired bootstrap interval of the log-loss difference).

Replies go only to channels in the space's reply namespace: ``reply_to`` must
start with ``{sr:space}:q:reply:``. Anything else gets
``{"id": ..., "ok": false, "error": "<what is wrong>"}``; when the request is too
broken to name a usable reply channel (or names one outside the namespace) the
error goes to ``{sr:space}:q:errors``.

Lobby split: up to ``lobby_exact_max`` entities every split is scored with the
model itself (exact). Larger lobbies use a surrogate: entity strength
``s_i = mean_j logit(matrix[i][j])`` and team value = mean member strength. With
equal team sizes, entities are taken in pairs by descending strength and the
stronger of each pair joins the currently weaker team; the final gap of team
strength sums is then at most the largest within-pair strength gap (each step
either shrinks the gap or leaves it at most that pair's gap). Best-improvement
swaps follow and never widen the gap. The reported probability is the model's
own prediction for the chosen split; ``gap_bound`` states the guarantee in
surrogate (logit) units.
"""

from __future__ import annotations

import itertools
import logging
import math
import re
from collections.abc import Callable, Sequence
from typing import Annotated, Any, Literal, Protocol

import numpy as np
import pydantic_core
from pydantic import BaseModel, ConfigDict, Field, TypeAdapter, ValidationError

from streamrate.batch import EncodedBatch
from streamrate.challengers import ChallengerSet, compare_window
from streamrate.errors import ConfigError, EventError
from streamrate.events import ContextMap, EntityId, Matchup, Side
from streamrate.models.base import Model, Prediction

WatcherId = Annotated[str, Field(pattern=r"^[A-Za-z0-9_.\-]{1,64}$")]
log = logging.getLogger("streamrate.queries")
CorrelationId = Annotated[str, Field(min_length=1, max_length=128)]
Channel = Annotated[str, Field(min_length=1, max_length=256, pattern=r"^[^\x00-\x20\x7f]+$")]
_STRICT = ConfigDict(extra="forbid", frozen=True)
MAX_WATCH = 256


class Pairing(BaseModel):
    model_config = _STRICT
    first: Side
    second: Side
    context: ContextMap = Field(default_factory=dict)


class PairingRequest(Pairing):
    kind: Literal["pairing"]
    id: CorrelationId
    reply_to: Channel


class LobbyRequest(BaseModel):
    model_config = _STRICT
    kind: Literal["lobby"]
    id: CorrelationId
    reply_to: Channel
    entities: Annotated[list[EntityId], Field(min_length=2, max_length=4096)]
    team_sizes: tuple[Annotated[int, Field(ge=1)], Annotated[int, Field(ge=1)]]
    context: ContextMap = Field(default_factory=dict)


class WatchRequest(BaseModel):
    model_config = _STRICT
    kind: Literal["watch"]
    id: CorrelationId
    reply_to: Channel
    action: Literal["set", "add", "renew", "clear"]
    pairings: Annotated[list[Pairing], Field(max_length=MAX_WATCH)] = Field(default_factory=list)
    # None: the shared watcher of older clients (channel ``{sr:space}:live``).
    watcher: WatcherId | None = None
    ttl_s: Annotated[float, Field(gt=0)] | None = None


MemberLabel = Annotated[str, Field(min_length=1, max_length=48)]


class PromoteRequest(BaseModel):
    model_config = _STRICT
    kind: Literal["promote"]
    id: CorrelationId
    reply_to: Channel
    model: MemberLabel


class CompareRequest(BaseModel):
    model_config = _STRICT
    kind: Literal["compare"]
    id: CorrelationId
    reply_to: Channel
    reference: MemberLabel | None = None


AnyRequest = PairingRequest | LobbyRequest | WatchRequest | PromoteRequest | CompareRequest
Request = Annotated[AnyRequest, Field(discriminator="kind")]
_REQUEST: TypeAdapter[AnyRequest] = TypeAdapter(Request)


def request_schema() -> dict[str, Any]:
    """JSON Schema (2020-12) of a request (what ``streamrate ask --schema`` prints)."""
    schema = _REQUEST.json_schema()
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "streamrate query request"
    return schema


class ModelView(Protocol):
    """What the query side needs from the consumer's live model."""

    lock: Any
    model: Model
    version: str
    applied: int
    changed: bool

    @property
    def status(self) -> str:
        """``loading`` / ``ready`` / ``stalled`` (see :class:`streamrate.consumer.LiveModel`)."""

    @property
    def detail(self) -> str: ...

    @property
    def behind(self) -> int | None: ...


def _matchup(first: Sequence[str], second: Sequence[str], context: dict[str, Any]) -> Matchup:
    # Already validated; skip a second validation in the hot path.
    return Matchup.model_construct(
        first=tuple(first), second=tuple(second), context=context, features={}
    )


def pair_matrix(model: Model, ids: Sequence[str], context: dict[str, Any]) -> np.ndarray:
    """``m[i, j]`` = P(ids[i], listed first, beats ids[j]); 0.5 on the diagonal.

    Both orders are predicted: a model with a first-side advantage or draws gives
    ``m[i, j] + m[j, i] != 1``.
    """
    n = len(ids)
    m = np.full((n, n), 0.5)
    fill_rows(model, ids, context, m, 0, n)
    return m


def fill_rows(
    model: Model, ids: Sequence[str], context: dict[str, Any], m: np.ndarray, lo: int, hi: int
) -> None:
    """Fill rows ``lo:hi`` of the pair matrix ``m`` (see :func:`pair_matrix`)."""
    n = len(ids)
    if n < 2 or hi <= lo:
        return
    if hasattr(model, "encode") and hasattr(model, "predict_encoded"):
        _fill_rows_encoded(model, ids, context, m, lo, hi)
        return
    # Every pairing of the rows in one call: a model made of models (the served
    # default) answers them member by member as arrays, not pair by pair.
    at = [(i, j) for i in range(lo, hi) for j in range(n) if i != j]
    got = model.predict_many([_matchup((ids[i],), (ids[j],), context) for i, j in at])
    iu, ju = zip(*at, strict=True)
    m[list(iu), list(ju)] = got.p_win


def _fill_rows_encoded(
    model: Any, ids: Sequence[str], context: dict[str, Any], m: np.ndarray, lo: int, hi: int
) -> None:
    # Encode one pairing to learn the context slots, then broadcast the rows of
    # every (i, j) pair of the slice into one batch: one vectorised prediction.
    one = model.encode([_matchup((ids[0],), (ids[1],), context)], add=False)
    rows = np.array([model.entities_.get(e) for e in ids], dtype=np.int32)
    n = len(ids)
    mask = ~np.eye(n, dtype=bool)[lo:hi]
    iu, ju = np.nonzero(mask)
    iu = iu + lo
    k = len(iu)
    batch = EncodedBatch(
        first=rows[iu].reshape(k, 1),
        second=rows[ju].reshape(k, 1),
        score=np.full(k, np.nan),
        ctx_idx=np.repeat(one.ctx_idx, k, axis=0),
        ctx_val=np.repeat(one.ctx_val, k, axis=0),
        time_s=np.full(k, np.nan),
        first_size=np.ones(k, dtype=np.int32),
        second_size=np.ones(k, dtype=np.int32),
    )
    m[iu, ju] = model.predict_encoded(batch).p_win


def _closeness(p: Prediction) -> float:
    return abs(p.expected_score - 0.5)


def exact_split(
    ids: Sequence[str], a: int, predict: Callable[[Sequence[str], Sequence[str]], Prediction]
) -> tuple[list[int], list[int]]:
    """Try every split into teams of sizes ``a`` and ``len(ids) - a``; return the most even."""
    n = len(ids)
    everyone = range(n)
    best: tuple[float, list[int], list[int]] | None = None
    for team in itertools.combinations(everyone, a):
        if 2 * a == n and 0 not in team:
            continue  # the mirror split was already scored
        chosen = set(team)
        other = [i for i in everyone if i not in chosen]
        score = _closeness(predict([ids[i] for i in team], [ids[i] for i in other]))
        if best is None or score < best[0]:
            best = (score, list(team), other)
    assert best is not None
    return best[1], best[2]


def heuristic_split(strength: np.ndarray, a: int) -> tuple[list[int], list[int], float, float]:
    """Surrogate split (see module docstring); returns teams, final gap and its bound.

    Gaps are ``|mean(A) - mean(B)|`` in surrogate units. The bound is only claimed
    for equal sizes; for unequal sizes it is ``inf``.
    """
    n = len(strength)
    b = n - a
    order = np.argsort(-strength, kind="stable")
    in_a = np.zeros(n, dtype=bool)
    bound = math.inf
    if a == b:
        diff = 0.0
        gaps = []
        for k in range(0, n, 2):
            hi, lo = order[k], order[k + 1]
            gaps.append(strength[hi] - strength[lo])
            if diff <= 0:
                in_a[hi] = True
                diff += strength[hi] - strength[lo]
            else:
                in_a[lo] = True
                diff -= strength[hi] - strength[lo]
        bound = float(max(gaps)) / a
    else:
        sum_a = sum_b = 0.0
        na = nb = 0
        for i in order:
            if nb >= b or (na < a and sum_a / a <= sum_b / b):
                in_a[i] = True
                sum_a += strength[i]
                na += 1
            else:
                sum_b += strength[i]
                nb += 1
    scale = 1.0 / a + 1.0 / b
    for _ in range(4 * n):
        ia, ib = np.flatnonzero(in_a), np.flatnonzero(~in_a)
        gap = strength[ia].mean() - strength[ib].mean()
        moved = gap - (strength[ia][:, None] - strength[ib][None, :]) * scale
        k = int(np.argmin(np.abs(moved)))
        if abs(moved.flat[k]) >= abs(gap) - 1e-12:
            break
        i, j = divmod(k, len(ib))
        in_a[ia[i]], in_a[ib[j]] = False, True
    ia, ib = np.flatnonzero(in_a), np.flatnonzero(~in_a)
    gap = abs(float(strength[ia].mean() - strength[ib].mean()))
    return ia.tolist(), ib.tolist(), gap, bound


def strengths(matrix: np.ndarray) -> np.ndarray:
    """Surrogate strength per entity: mean log-odds of beating each other entity.

    Both orders count (``(logit m[i, j] - logit m[j, i]) / 2``), which cancels a
    first-side advantage.
    """
    n = len(matrix)
    p = np.clip(matrix, 1e-6, 1 - 1e-6)
    lo = np.log(p) - np.log1p(-p)
    lo = 0.5 * (lo - lo.T)
    np.fill_diagonal(lo, 0.0)
    return lo.sum(axis=1) / max(n - 1, 1)


class QueryError(EventError):
    """A request that cannot be answered; the message goes back to the asker."""


MAX_ERROR_CHARS = 300
"""Error texts (replies and log lines) are cut to this length: never the payload."""


class NotReadyError(QueryError):
    """The model is not loaded yet or the consumer cannot apply events; the reply
    carries ``status`` (``loading`` or ``stalled``)."""

    def __init__(self, status: str, detail: str) -> None:
        super().__init__(f"not ready: {status}: {detail}")
        self.status = status


def _describe(exc: ValidationError) -> str:
    parts = []
    for err in exc.errors(include_url=False):
        loc = ".".join(str(p) for p in err["loc"]) or "request"
        parts.append(f"{loc}: {err['msg'].removeprefix('Value error, ')}")
    return "; ".join(parts[:5])[:MAX_ERROR_CHARS]


def parse_request(raw: bytes | str, max_bytes: int) -> AnyRequest:
    """Validate a request; :class:`QueryError` names what is wrong.

    The JSON parser has its own nesting limit, so deeply nested input is an
    error like any other (no recursion in our code).
    """
    if len(raw) > max_bytes:
        raise QueryError(f"request: {len(raw)} bytes is longer than the limit of {max_bytes}")
    try:
        req = _REQUEST.validate_json(raw)
    except ValidationError as exc:
        raise QueryError(_describe(exc)) from exc
    if isinstance(req, PairingRequest):
        try:
            Matchup(first=req.first, second=req.second, context=req.context)
        except ValidationError as exc:
            raise QueryError(_describe(exc)) from exc
    return req


_PEEK_ID = re.compile(rb'"id"\s*:\s*"((?:[^"\\\x00-\x1f]|\\.){1,128})"')
_PEEK_REPLY = re.compile(rb'"reply_to"\s*:\s*"([^"\\\x00-\x20\x7f]{1,256})"')
_PEEK_KIND = re.compile(rb'"kind"\s*:\s*"([a-z]{1,16})"')


def _text(raw: bytes | str) -> bytes:
    return raw.encode("utf-8", "replace") if isinstance(raw, str) else raw


def peek(raw: bytes | str) -> tuple[str | None, str | None, str | None]:
    """(id, reply_to, kind) found by pattern, without parsing the JSON.

    Cheap and linear in the size, whatever the nesting: used to route a busy or
    error reply for a request that is not (or not yet) parsed. The first match
    of each key wins; a request is only answered after full validation.
    """
    b = _text(raw)
    found: list[str | None] = []
    for pattern in (_PEEK_ID, _PEEK_REPLY, _PEEK_KIND):
        m = pattern.search(b)
        try:
            found.append(m.group(1).decode() if m else None)
        except UnicodeDecodeError:
            found.append(None)
    cid, reply, kind = found
    if cid is not None and "\\" in cid:
        cid = None  # an escaped id: not worth decoding by hand
    return cid, reply, kind


def salvage_reply_to(raw: bytes | str) -> tuple[str | None, str | None]:
    """Best-effort (id, reply_to) of a request that failed validation."""
    try:
        data = pydantic_core.from_json(raw)  # bounded nesting: an error, never a recursion
    except ValueError:
        data = None
    if not isinstance(data, dict):
        cid, reply, _ = peek(raw) if data is None else (None, None, None)
        return cid, reply
    cid, reply = data.get("id"), data.get("reply_to")
    ok_reply = isinstance(reply, str) and 0 < len(reply) <= 256 and reply.isprintable()
    ok_id = isinstance(cid, str) and len(cid) <= 128
    return (cid if ok_id else None), (reply if ok_reply else None)


def in_namespace(reply_to: str | None, prefix: str) -> bool:
    """A reply channel the service may publish on: the namespace and a name after it."""
    return (
        reply_to is not None
        and len(reply_to) > len(prefix)
        and reply_to.startswith(prefix)
        and reply_to.isprintable()
        and " " not in reply_to
    )


EXPENSIVE_KINDS = frozenset({"lobby", "compare"})
"""Kinds shed first under load."""
COMPARE_COST = 20_000  # a bootstrap over the recent window, in pair predictions


def request_cost(req: AnyRequest, lobby_exact_max: int) -> int:
    """Work a request asks for, in pair predictions (the unit of the cost budget)."""
    if isinstance(req, LobbyRequest):
        n = len(req.entities)
        cost = n * (n - 1)
        if n <= lobby_exact_max:
            cost += math.comb(n, min(req.team_sizes))
        return cost
    if isinstance(req, WatchRequest):
        return max(1, len(req.pairings))
    if isinstance(req, CompareRequest):
        return COMPARE_COST
    return 1


class Answerer:
    """Turns a validated request into a reply dict, reading the live model under its lock."""

    def __init__(
        self,
        view: ModelView,
        lobby_exact_max: int,
        lobby_max: int,
        pairs_per_lock: int = 2048,
    ) -> None:
        self.view = view
        self.lobby_exact_max = lobby_exact_max
        self.lobby_max = lobby_max
        # The matrix of a large lobby is computed in slices of about this many pair
        # predictions, releasing the model lock between slices: the consumer applies
        # events in the gaps instead of waiting for the whole lobby.
        self.pairs_per_lock = pairs_per_lock

    def _ready(self) -> None:
        """Every model question passes here: no answer from a model that is not
        loaded, or that the consumer cannot keep current."""
        status = self.view.status
        if status != "ready":
            raise NotReadyError(status, self.view.detail)

    def _meta(self) -> dict[str, Any]:
        meta = {
            "model": self.view.model.kind,
            "model_version": self.view.version,
            "applied": self.view.applied,
            "behind": self.view.behind,
        }
        if isinstance(self.view.model, ChallengerSet):
            meta["answered_by"] = self.view.model.active
        return meta

    def _challengers(self) -> ChallengerSet:
        model = self.view.model
        if not isinstance(model, ChallengerSet):
            raise QueryError(f"this space runs model {model.kind!r}, not a challenger set")
        return model

    def promote(self, req: PromoteRequest) -> dict[str, Any]:
        self._ready()
        if not getattr(self.view, "writable", True):
            raise QueryError("promote goes to the writer; this replica follows it")
        # Under the model lock: the consumer learns whole chunks under it, so the
        # switch falls between two chunks, never inside one.
        with self.view.lock:
            model = self._challengers()
            previous = model.active
            try:
                model.promote(req.model)
            except ConfigError as exc:
                raise QueryError(f"model: {exc}") from exc
            if model.active != previous:
                self.view.changed = True  # saved by the next checkpoint, events or not
                pending = getattr(self.view, "promoted", None)
                if pending is not None:  # the writer logs it for the replicas
                    pending.append(model.active)
                log.info("promotion: %s answers now (was %s)", model.active, previous)
            meta = self._meta()
        return {"previous": previous, **meta}

    def compare(self, req: CompareRequest) -> dict[str, Any]:
        self._ready()
        with self.view.lock:  # only the copy is made under the lock; the bootstrap is not
            window = self._challengers().window()
            meta = self._meta()
        try:
            table = compare_window(window, req.reference)
        except ConfigError as exc:
            raise QueryError(f"reference: {exc}") from exc
        return {**table, **meta}

    def pairing(self, req: PairingRequest) -> dict[str, Any]:
        self._ready()
        mu = _matchup(req.first, req.second, dict(req.context))
        with self.view.lock:
            model = self.view.model
            p = model.predict(mu)
            seen = {e: model.seen(e) for e in mu.entities()}
            meta = self._meta()
        return {
            "p_first_wins": p.p_win,
            "p_draw": p.p_draw if model.has_draws else None,
            "seen": seen,
            **meta,
        }

    def lobby(self, req: LobbyRequest) -> dict[str, Any]:
        self._ready()
        ids, (a, b) = req.entities, req.team_sizes
        if len(set(ids)) != len(ids):
            raise QueryError("entities: an entity is listed twice")
        if a + b != len(ids):
            raise QueryError(f"team_sizes: {a} + {b} does not equal {len(ids)} entities")
        if len(ids) > self.lobby_max:
            raise QueryError(f"entities: {len(ids)} is more than the limit of {self.lobby_max}")
        ctx = dict(req.context)
        n = len(ids)
        matrix = np.full((n, n), 0.5)
        rows = max(1, self.pairs_per_lock // max(n - 1, 1))
        meta: dict[str, Any] = {}
        for lo in range(0, n, rows):
            with self.view.lock:
                if lo == 0:
                    meta = self._meta()
                fill_rows(self.view.model, ids, ctx, matrix, lo, min(n, lo + rows))

        def predict(first: Sequence[str], second: Sequence[str]) -> Prediction:
            return self.view.model.predict(_matchup(first, second, ctx))

        if n <= self.lobby_exact_max:
            with self.view.lock:
                ta, tb = exact_split(ids, a, predict)
            method, gap, bound = "exact", None, 0.0
        else:  # the surrogate needs only the matrix: no lock
            ta, tb, gap, bound = heuristic_split(strengths(matrix), a)
            method = "heuristic"
        first, second = [ids[i] for i in ta], [ids[i] for i in tb]
        with self.view.lock:
            p = predict(first, second)
            has_draws = self.view.model.has_draws
        return {
            "entities": ids,
            "matrix": matrix.round(6).tolist(),
            "split": {
                "first": first,
                "second": second,
                "p_first_wins": p.p_win,
                "p_draw": p.p_draw if has_draws else None,
            },
            "method": method,
            "surrogate_gap": gap,
            "gap_bound": None if math.isinf(bound) else bound,
            **meta,
        }


def handle(
    raw: bytes | str,
    answerer: Answerer,
    on_watch: Callable[[WatchRequest], dict[str, Any]],
    max_bytes: int,
    *,
    reply_prefix: str,
    max_cost: int = 1 << 62,
) -> tuple[str | None, dict[str, Any], str]:
    """Answer one raw request: (reply channel or None, reply, kind for metrics).

    ``None`` as the channel means the space's errors channel: the request named
    no usable reply channel, or one outside ``reply_prefix`` (the reply
    namespace); such a request is refused, not answered.
    """
    try:
        req = parse_request(raw, max_bytes)
    except QueryError as exc:
        cid, reply_to = salvage_reply_to(raw)
        channel = reply_to if in_namespace(reply_to, reply_prefix) else None
        return channel, {"id": cid, "ok": False, "error": str(exc)}, "invalid"
    if not in_namespace(req.reply_to, reply_prefix):
        error = f"reply_to: must start with {reply_prefix!r} (the reply namespace)"
        return None, {"id": req.id, "ok": False, "error": error}, req.kind
    cost = request_cost(req, answerer.lobby_exact_max)
    if cost > max_cost:
        error = f"cost: this {req.kind} needs {cost} predictions, over the budget of {max_cost}"
        return req.reply_to, {"id": req.id, "ok": False, "error": error}, req.kind
    try:
        if isinstance(req, PairingRequest):
            body = answerer.pairing(req)
        elif isinstance(req, LobbyRequest):
            body = answerer.lobby(req)
        elif isinstance(req, PromoteRequest):
            body = answerer.promote(req)
        elif isinstance(req, CompareRequest):
            body = answerer.compare(req)
        else:
            body = on_watch(req)
    except QueryError as exc:
        failed = {"id": req.id, "ok": False, "error": str(exc)[:MAX_ERROR_CHARS]}
        if isinstance(exc, NotReadyError):
            failed["status"] = exc.status
        return req.reply_to, failed, req.kind
    return req.reply_to, {"id": req.id, "ok": True, "kind": req.kind, **body}, req.kind
