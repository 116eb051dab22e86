"""Vessel ping tracks -> fishing hours per ping: the rules, once, as DuckDB SQL.

One definition serves the ping adapter (a file's pings), the store's view (the pings at
the edges of the files of one source, joined across file boundaries; harmonize.parts) and
the Dask engine, which runs this text in DuckDB on each bucket of whole vessels
(``harmonize.engines.dask_engine.ping_track``).

Per vessel, pings ordered by time:

- a ping is an isolated position jump (``spike``) when reaching it and leaving it both take
  more than ``max_speed_kn``; at a track's end, when the one link is too fast and the next
  one is not. The neighbours of a jump are joined directly;
- each ping gets half of the interval to its previous ping and half of the interval to its
  next one, each half capped at ``max_gap_h / 2`` (common practice: a long gap is not
  fishing time); a ping with no neighbour on a side gets nothing for that side;
- a missing speed is the mean of the speeds of the links within ``max_gap_h``;
- a ping fishes when its speed lies in its gear's window [smin, smax] (Skaar et al. 2011,
  ICES J. Mar. Sci. 68:1615-1620; Mills et al. 2007, ICES J. Mar. Sci. 64:248-255).

Everything a ping's result depends on lies within :data:`RADIUS` pings of it on its track.
That is what lets a source delivered as many files be joined exactly: a ping more than
``RADIUS`` pings from both ends of its vessel's part of a file (an *interior* ping) gets
the same result in the file as in the whole track, and the pings nearer an end (*owned
edge* pings) are recomputed from the :data:`EDGE` pings at both ends of every file.
"""

from __future__ import annotations

from harmonize.geodesy import M_PER_NMI, distance_sql

#: A ping's result depends on the pings up to this many places before and after it.
RADIUS = 3
#: Pings kept at each end of a vessel's part of a file: an owned edge ping (within RADIUS of
#: an end) and the RADIUS pings beyond it on the file's side.
EDGE = 2 * RADIUS


def track_sql(pings: str, key: str, order: str, vmax: str, gap: str, smin: str = "smin", smax: str = "smax") -> str:
    """SELECT adding the track columns to every column of ``pings``.

    Parameters
    ----------
    pings
        A relation (table name or parenthesised query) with columns ``row`` (any tie-breaker
        that names the ping in messages), ``t`` (TIMESTAMP, UTC), ``lat``, ``lon``, ``sog``
        (knots, NULL when not reported), ``smin``, ``smax`` (the gear's speed window, unless
        given below), and the columns of ``key``.
    key
        The track's partition, e.g. ``vid`` or ``source_id, vessel``.
    order
        The order within a track, e.g. ``t, row``.
    vmax, gap
        SQL for the position-jump speed limit (knots) and the gap cap (hours): literals or
        columns of ``pings``.
    smin, smax
        SQL for the gear's speed window (knots), evaluated after the ordering: columns of
        ``pings`` by default, or expressions of them (e.g. a lookup by a gear number, so that
        the sort carries one small number instead of the window).

    Returns
    -------
    str
        A SELECT with the columns of ``pings`` and: ``s_in`` (knots of the link from the
        previous ping), ``s_out``, ``r_p1``, ``r_n1`` (rows of the neighbours), ``spike``,
        ``hours``, ``speed``, ``fishing``, ``owned`` (within :data:`RADIUS` of an end of the
        track) and ``edge`` (within :data:`EDGE` of an end).
    """
    def hours(a: str, b: str) -> str:
        return f"((epoch_us({b}) - epoch_us({a})) / 3.6e9)"

    def speed(a: str, b: str) -> str:  # knots from ping a to ping b (columns t_a, lat_a, ...)
        return (f"({distance_sql(f'lat_{a}', f'lon_{a}', f'lat_{b}', f'lon_{b}')} / {M_PER_NMI!r} "
                f"/ nullif({hours('t_' + a, 't_' + b)}, 0))")

    # link k -> k+1 is fast when the later ping's speed-in exceeds the limit
    fast = {("p3", "p2"): "f_p2", ("p2", "p1"): "f_p1", ("p1", "me"): "f_me",
            ("me", "n1"): "f_n1", ("n1", "n2"): "f_n2", ("n2", "n3"): "f_n3"}

    def spike(p2: str, p1: str, me: str, n1: str, n2: str) -> str:
        # interior: too fast on both sides; first/last ping: too fast to a neighbour that
        # itself goes on at a plausible speed
        return f"""(CASE WHEN h_{p1} AND h_{n1} THEN {fast[(p1, me)]} AND {fast[(me, n1)]}
                         WHEN h_{n1} THEN {fast[(me, n1)]} AND h_{n2} AND NOT {fast[(n1, n2)]}
                         WHEN h_{p1} THEN {fast[(p1, me)]} AND h_{p2} AND NOT {fast[(p2, p1)]}
                         ELSE false END)"""

    flags = ", ".join([
        f"coalesce(lag(s_in, 2) OVER w > {vmax}, false) AS f_p2",
        f"coalesce(lag(s_in, 1) OVER w > {vmax}, false) AS f_p1",
        f"coalesce(s_in > {vmax}, false) AS f_me",
        f"coalesce(lead(s_in, 1) OVER w > {vmax}, false) AS f_n1",
        f"coalesce(lead(s_in, 2) OVER w > {vmax}, false) AS f_n2",
        f"coalesce(lead(s_in, 3) OVER w > {vmax}, false) AS f_n3",
        "true AS h_me",
    ] + [f"lag(t, {k}) OVER w IS NOT NULL AS h_p{k}" for k in (1, 2, 3)]
      + [f"lead(t, {k}) OVER w IS NOT NULL AS h_n{k}" for k in (1, 2, 3)]
      + [f"lag({c}, {k}) OVER w AS {c}_p{k}" for c in ("t", "lat", "lon") for k in (1, 2)]
      + [f"lead({c}, {k}) OVER w AS {c}_n{k}" for c in ("t", "lat", "lon") for k in (1, 2)]
      + ["lag(row) OVER w AS r_p1", "lead(row) OVER w AS r_n1", "lead(s_in) OVER w AS s_out",
         f"(lag(t, {EDGE}) OVER w IS NULL OR lead(t, {EDGE}) OVER w IS NULL) AS edge"])

    def pick(c: str, side: str) -> str:
        near, far, flag = ("p1", "p2", "spike_p1") if side == "p" else ("n1", "n2", "spike_n1")
        return f"CASE WHEN {flag} THEN {c}_{far} ELSE {c}_{near} END AS {c}_{side}e"

    eff = ", ".join(pick(c, side) for c in ("t", "lat", "lon") for side in ("p", "n"))
    dt_prev, dt_next = hours("t_pe", "t"), hours("t", "t_ne")
    # half of each neighbouring interval, capped; no neighbour on a side gives 0 (DuckDB's
    # least() would skip a NULL, so the cap is spelt out)
    attributed = (f"(CASE WHEN t_pe IS NULL THEN 0 ELSE least({dt_prev}, {gap}) END) / 2 + "
                  f"(CASE WHEN t_ne IS NULL THEN 0 ELSE least({dt_next}, {gap}) END) / 2")
    # derived speed: mean of the speeds from the previous and to the next ping, using only
    # intervals within max_gap_h (a skipped jump's neighbours are joined directly)
    me = "t AS t_me, lat AS lat_me, lon AS lon_me"
    sp_prev = (f"CASE WHEN {dt_prev} <= {gap} THEN CASE WHEN spike_p1 THEN {speed('pe', 'me')} "
               f"ELSE s_in END END")
    sp_next = (f"CASE WHEN {dt_next} <= {gap} THEN CASE WHEN spike_n1 THEN {speed('me', 'ne')} "
               f"ELSE s_out END END")
    return f"""
        SELECT *, coalesce(speed BETWEEN {smin} AND {smax}, false) AS fishing, NOT (h_p{RADIUS} AND h_n{RADIUS}) AS owned
        FROM (
            SELECT *, coalesce(sog, (coalesce(sp_prev, sp_next) + coalesce(sp_next, sp_prev)) / 2) AS speed
            FROM (
                SELECT *, {attributed} AS hours, {sp_prev} AS sp_prev, {sp_next} AS sp_next
                FROM (
                    SELECT *, {me}, {eff} FROM (
                        SELECT *, {spike('p2', 'p1', 'me', 'n1', 'n2')} AS spike,
                               {spike('p3', 'p2', 'p1', 'me', 'n1')} AS spike_p1,
                               {spike('p1', 'me', 'n1', 'n2', 'n3')} AS spike_n1
                        FROM (
                            SELECT * EXCLUDE (t_cur, lat_cur, lon_cur, t_prev, lat_prev, lon_prev), {flags}
                            FROM (
                                SELECT *, {speed('prev', 'cur')} AS s_in FROM (
                                    SELECT *, t AS t_cur, lat AS lat_cur, lon AS lon_cur,
                                           lag(t) OVER w0 AS t_prev, lag(lat) OVER w0 AS lat_prev,
                                           lag(lon) OVER w0 AS lon_prev
                                    FROM {pings}
                                    WINDOW w0 AS (PARTITION BY {key} ORDER BY {order})))
                            WINDOW w AS (PARTITION BY {key} ORDER BY {order}))))))
    """


__all__ = ["EDGE", "RADIUS", "track_sql"]
