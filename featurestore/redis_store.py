"""The Redis state store: the live path's shared state, behind the same interface as MemoryStore.

Every batch is one Lua script call (atomic: its state changes and the source offsets it
applied land together or not at all); every read is one script call too (atomic, one round
trip, its commands and replies packed into one string each). Key layout,
lifetimes and the encoding of writes and reads live in ``featurestore.redis_layout``.
Works with redis-py clients for a real server and for fakeredis.
"""

from __future__ import annotations

import os
from collections.abc import Collection, Mapping
from typing import Any

from featurestore.config import EngineConfig
from featurestore.redis_layout import (
    Layout,
    decode_state,
    delta_ops,
    flatten,
    parse_positions,
    read_plan,
)
from featurestore.state import VehicleState
from featurestore.store import (
    AsOfError,
    Delta,
    ReadRequest,
    ReadResult,
    SourcePosition,
    StaleBatchError,
)

# The apply script: refuse the batch if a partition already applied offsets at or after its
# span's start, then run the operations (one argument, fields separated by the unit
# separator 0x1F, which JSON text and the project's ids never contain: packing one string is
# far cheaper for the client than sending each field as an argument). Checks come first and
# the operations cannot fail on well-formed keys, so a batch is never half applied.
APPLY_LUA = """
local unpack = table.unpack or unpack
local pos = KEYS[1]
local n = tonumber(ARGV[1])
local i = 2
for _ = 1, n do
  local stored = redis.call('HGET', pos, ARGV[i])
  if stored and tonumber(stored) > tonumber(ARGV[i + 1]) then
    return redis.error_reply('STALE partition ' .. ARGV[i] .. ' has applied up to offset ' ..
      (tonumber(stored) - 1) .. ', batch starts at ' .. ARGV[i + 1])
  end
  i = i + 2
end
local A = {}
local packed = ARGV[i] or ''
local s = 1
while s <= #packed do
  local e = string.find(packed, '\\31', s, true)
  if not e then e = #packed + 1 end
  A[#A + 1] = string.sub(packed, s, e - 1)
  s = e + 1
end
local ARG = A
i = 1
local argc = #ARG
local ops = 0
while i <= argc do
  local op = ARG[i]
  if op == 'I' then
    redis.call('HINCRBY', ARG[i + 1], ARG[i + 2], ARG[i + 3]); i = i + 4
  elseif op == 'Z' then
    local m = 2 * tonumber(ARG[i + 2])
    redis.call('ZADD', ARG[i + 1], unpack(ARG, i + 3, i + 2 + m)); i = i + 3 + m
  elseif op == 'X' then
    local m = 2 * tonumber(ARG[i + 2])
    redis.call('ZADD', ARG[i + 1], 'XX', unpack(ARG, i + 3, i + 2 + m)); i = i + 3 + m
  elseif op == 'R' then
    local m = tonumber(ARG[i + 2])
    redis.call('ZREM', ARG[i + 1], unpack(ARG, i + 3, i + 2 + m)); i = i + 3 + m
  elseif op == 'S' then
    redis.call('SET', ARG[i + 1], ARG[i + 2], 'EX', ARG[i + 3]); i = i + 4
  elseif op == 'E' then
    redis.call('EXPIRE', ARG[i + 1], ARG[i + 2]); i = i + 3
  elseif op == 'T' then
    redis.call('ZREMRANGEBYSCORE', ARG[i + 1], '-inf', ARG[i + 2]); i = i + 3
  elseif op == 'H' then
    redis.call('HSET', ARG[i + 1], ARG[i + 2], ARG[i + 3]); i = i + 4
  elseif op == 'M' then
    local old = redis.call('HGET', ARG[i + 1], ARG[i + 2])
    if not old or tonumber(old) < tonumber(ARG[i + 3]) then
      redis.call('HSET', ARG[i + 1], ARG[i + 2], ARG[i + 3])
    end
    i = i + 4
  elseif op == 'P' then
    local floor = tonumber(ARG[i + 2])
    for _, f in ipairs(redis.call('HKEYS', ARG[i + 1])) do
      if tonumber(string.sub(f, 2)) < floor then redis.call('HDEL', ARG[i + 1], f) end
    end
    i = i + 3
  else
    return redis.error_reply('unknown operation ' .. tostring(op))
  end
  ops = ops + 1
end
return ops
"""


# The read script: run a read's records (one string: records separated by 0x1E, their fields by
# 0x1F; see ``featurestore.redis_layout.ReadPlan``) and answer one string, one record per
# request record, likewise separated. The per-key work happens here, next to the data: cell
# blocks are filtered to the buckets asked for and the logs subtracted, presence is counted,
# so the reply holds only the numbers the features need. One round trip, atomic like
# MULTI/EXEC, two strings for redis-py to encode and parse. Numbers stay exact: Lua's doubles
# hold integers to 2^53, far above any counter summed here (route sums are summed by the
# caller, in Python integers).
READ_LUA = """
local unpack = table.unpack or unpack
local find, sub, match = string.find, string.sub, string.match
local gmatch = string.gmatch
local concat = table.concat
local t = tonumber(ARGV[1])
local after = '(' .. ARGV[1]
local req = ARGV[2]
-- Every log entry is scored by an arrival the watermark (in the hash ARGV[3]) has passed, so
-- a read at or after the watermark, the live "now", needs no log.
local wm = redis.call('HGET', ARGV[3], 'wm')
local logs = wm and t < tonumber(wm)
local NAMES = {}  -- bucket -> its counter fields f, p, d and its text
local DAYS = {}  -- 'lo:hi' -> the route fields of those days
local out = {}
local n = #req
local s = 1
while s <= n do
  local e = find(req, '\\30', s, true) or (n + 1)
  local a = {}
  local p = s
  while p <= e do
    local q = find(req, '\\31', p, true)
    if not q or q > e then q = e end
    a[#a + 1] = sub(req, p, q - 1)
    p = q + 1
  end
  local kind = a[1]
  if kind == 'V' then
    local st = nil
    if logs and a[3] ~= '' then
      local log = redis.call('ZRANGEBYSCORE', a[3], after, '+inf', 'LIMIT', 0, 1)
      -- the state before the first change after T is the state at T: the first group
      -- scored after T holds it (batch id, then GS arrival|state per fix, in order)
      local g = log[1]
      local p = g and find(g, '\\29', 1, true)
      while p do
        local bar = find(g, '|', p + 1, true)
        local nxt = find(g, '\\29', bar + 1, true)
        if tonumber(sub(g, p + 1, bar - 1)) > t then
          st = sub(g, bar + 1, (nxt or (#g + 1)) - 1)
          break
        end
        p = nxt
      end
    end
    if st == nil then st = redis.call('GET', a[2]) or '' end
    out[#out + 1] = st
  elseif kind == 'C' then
    local lo, hi = tonumber(a[2]), tonumber(a[3])
    local H = {}  -- the blocks' counters by field name
    local any = false
    for k = 5, #a do
      local h = redis.call('HGETALL', a[k])
      for j = 1, #h, 2 do H[h[j]] = h[j + 1] end
      if h[1] then any = true end
    end
    local parts = {}
    if any then
      local minus = nil  -- bucket -> the increments logged after T
      if logs and a[4] ~= '' then
        local log = redis.call('ZRANGEBYSCORE', a[4], after, '+inf')
        for j = 1, #log do  -- groups scored after T: their entries that arrived after T
          for arr, b, f, pk, d in gmatch(log[j], '\\29(%d+)|(%d+)|(%d+)|(%d+)|(%d+)') do
            b = tonumber(b)
            if b >= lo and b <= hi and tonumber(arr) > t then
              minus = minus or {}
              local x = minus[b]
              if not x then
                x = {0, 0, 0}
                minus[b] = x
              end
              x[1] = x[1] + tonumber(f)
              x[2] = x[2] + tonumber(pk)
              x[3] = x[3] + tonumber(d)
            end
          end
        end
      end
      local m = 0
      for b = lo, hi do
        local nm = NAMES[b]
        if not nm then
          local text = tostring(b)
          nm = {'f' .. text, 'p' .. text, 'd' .. text, text}
          NAMES[b] = nm
        end
        local f, pk, d = H[nm[1]], H[nm[2]], H[nm[3]]
        if f or pk or d then
          f, pk, d = f or '0', pk or '0', d or '0'
          local x = minus and minus[b]
          if x then
            f = tostring(tonumber(f) - x[1])
            pk = tostring(tonumber(pk) - x[2])
            d = tostring(tonumber(d) - x[3])
          end
          if f ~= '0' or pk ~= '0' or d ~= '0' then
            parts[m + 1] = nm[4]
            parts[m + 2] = f
            parts[m + 3] = pk
            parts[m + 4] = d
            m = m + 4
          end
        end
      end
    end
    out[#out + 1] = concat(parts, '\\31')
  elseif kind == 'P' then
    local m = tonumber(a[4])
    local c = {}
    for k = 2, 3 do
      local members = redis.call('ZRANGEBYSCORE', a[k], after, '+inf')
      local cnt = 0
      for j = 1, #members do
        local ev, arr = match(members[j], '|(%-?%d+)|(%-?%d+)$')
        if tonumber(arr) <= t and tonumber(ev) >= m then cnt = cnt + 1 end
      end
      c[k - 1] = cnt
    end
    out[#out + 1] = c[1] .. '\\31' .. c[2]
  elseif kind == 'R' then
    local span = a[4] .. ':' .. a[5]
    local fields = DAYS[span]
    if not fields then
      fields = {}
      for d = tonumber(a[4]), tonumber(a[5]) do
        local day = tostring(d)
        fields[#fields + 1] = 'n' .. day
        fields[#fields + 1] = 's' .. day
        fields[#fields + 1] = 'q' .. day
      end
      DAYS[span] = fields
    end
    local vals = redis.call('HMGET', a[2], unpack(fields))
    local sums = {}  -- the days that have trips, as n s q
    for j = 1, #fields, 3 do
      if vals[j] or vals[j + 1] or vals[j + 2] then
        sums[#sums + 1] = vals[j] or '0'
        sums[#sums + 1] = vals[j + 1] or '0'
        sums[#sums + 1] = vals[j + 2] or '0'
      end
    end
    local r = concat(sums, '\\31')
    if logs and a[3] ~= '' then
      local log = redis.call('ZRANGEBYSCORE', a[3], after, '+inf')
      if #log > 0 then
        local items = {}
        for j = 1, #log do
          local day, dur = match(log[j], '^[^|]*|[^|]*|([^|]*)|([^|]*)$')
          items[#items + 1] = day
          items[#items + 1] = dur
        end
        r = r .. '\\29' .. concat(items, '\\31')
      end
    end
    out[#out + 1] = r
  else
    local r = redis.call(unpack(a, 2))
    if type(r) == 'table' then
      for i = 1, #r do
        if r[i] == false then r[i] = '' else r[i] = tostring(r[i]) end
      end
      out[#out + 1] = concat(r, '\\31')
    elseif r == false or r == nil then
      out[#out + 1] = ''
    else
      out[#out + 1] = tostring(r)
    end
  end
  s = e + 1
end
return concat(out, '\\30')
"""


class RedisStore:
    """A StateStore in Redis (a real server, or fakeredis for the embedded default and tests).

    ``history_ms``: how long before its watermark it answers reads exactly (arrival-tagged
    logs kept that long, recorded in the state by every batch); None for a reader that takes
    the history the writers recorded (``cellpulse serve``'s default). A reader never answers
    further back than the writers keep. ``namespace`` prefixes every key; ``ttl_margin_s`` is
    added to every key's lifetime. Lifetimes are wall-clock seconds derived from the longest
    window, the vehicle expiry, the route days and the history (see ``Layout``).
    """

    def __init__(self, client: Any, config: EngineConfig | None = None, *,
                 history_ms: int | None = 0, namespace: str = "cellpulse",
                 ttl_margin_s: int = 600) -> None:
        self.client = client
        self.config = config or EngineConfig()
        self.history_from_state = history_ms is None
        self.history_ms = 0 if history_ms is None else int(history_ms)
        self.layout = Layout(self.config, namespace, self.history_ms, ttl_margin_s)
        self._apply = client.register_script(APPLY_LUA)
        self._read = client.register_script(READ_LUA)

    @classmethod
    def from_url(cls, url: str, config: EngineConfig | None = None, **kwargs: Any
                 ) -> RedisStore:
        """Connect to ``redis://…`` (a real server) or ``memory://`` (in-process fakeredis)."""
        if url.startswith("memory://"):
            import fakeredis

            client = fakeredis.FakeRedis()
        else:
            import redis

            client = redis.Redis.from_url(url, socket_timeout=10, socket_connect_timeout=5,
                                          health_check_interval=30)
        return cls(client, config, **kwargs)

    # --- writes ------------------------------------------------------------------------
    def load_vehicles(self, vehicle_ids: Collection[str]) -> dict[str, VehicleState]:
        ids = list(vehicle_ids)
        if not ids:
            return {}
        raws = self.client.mget([self.layout.vehicle(v) for v in ids])
        return {v: decode_state(r) for v, r in zip(ids, raws, strict=True)
                if r is not None}

    def apply(self, delta: Delta) -> None:
        if self.history_from_state:
            raise TypeError("a store opened with history_ms=None reads the writers' history; "
                            "writers must give their own history_ms")
        checks, ops = delta_ops(delta, self.layout, os.urandom(4).hex())
        if not checks and not ops:
            return
        import redis

        try:
            self._apply(keys=[self.layout.positions], args=flatten(checks, ops))
        except redis.ResponseError as exc:
            if "STALE" in str(exc):
                raise StaleBatchError(str(exc).split("STALE ", 1)[-1]) from None
            raise

    def set_highwaters(self, ends: Mapping[str, int]) -> None:
        """Record each partition's end offset as its consumer last saw it (for ``known_at``)."""
        if ends:  # never lowered: a member that just lost a partition may report an old end
            ops = [("M", self.layout.highwaters, k, str(int(v))) for k, v in sorted(ends.items())]
            self._apply(keys=[self.layout.positions], args=flatten([], ops))

    # --- reads -------------------------------------------------------------------------
    def read(self, request: ReadRequest) -> ReadResult:
        t = request.as_of_ms
        if t is None:
            t = self.watermark_ms() or 0
        plan = read_plan(request, self.layout, t,
                         with_logs=True if self.history_from_state else None)
        raw = self._read(keys=[], args=[t, plan.request, self.layout.meta])
        out = plan.parse(raw.split(b"\x1e"))
        wm = out.watermark_ms
        if wm is not None and t < wm:
            kept = self.effective_history_ms(out.history_ms)
            if not kept or t < wm - kept:
                raise AsOfError(
                    f"as of {t} ms is before what this store can answer: its watermark is {wm} "
                    f"ms and it keeps {kept} ms of history"
                )
        return out

    def effective_history_ms(self, recorded: int | None) -> int:
        """How far back reads are answered: never beyond what the writers recorded keeping."""
        if self.history_from_state:
            return recorded or 0
        return self.history_ms if recorded is None else min(self.history_ms, recorded)

    def watermark_ms(self) -> int | None:
        wm = self.client.hget(self.layout.meta, "wm")
        return None if wm is None else int(wm)

    def offsets(self) -> Mapping[str, int]:
        return {p: pos.next_offset for p, pos in self.positions().items()}

    def positions(self) -> Mapping[str, SourcePosition]:
        pipe = self.client.pipeline(transaction=True)
        pipe.hgetall(self.layout.positions)
        pipe.hgetall(self.layout.arrivals)
        nxt, arr = pipe.execute()
        return parse_positions(nxt, arr)

    def counters(self) -> dict[str, int]:
        return {_s(k): int(v) for k, v in self.client.hgetall(self.layout.counts).items()}

    def highwaters(self) -> dict[str, int]:
        return {_s(k): int(v) for k, v in self.client.hgetall(self.layout.highwaters).items()}

    def ping(self) -> bool:
        return bool(self.client.ping())


def _s(x: bytes | str) -> str:
    return x.decode() if isinstance(x, bytes) else x
