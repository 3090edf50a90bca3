"""Case 7: shaping a query: metadata of a large service, find, tables, check.

An invented VOSI tableset (fixed seed; 5,000 tables x 40 columns, about 45 MB of XML) is served over loopback HTTP; a fresh process reads it with ``Desk.tables`` and its
peak memory growth is compared with ``xml.etree.ElementTree.parse`` of the same document in
another fresh process (what holding the whole document costs).  From the index it filled:
``find`` over 100,000+ cached columns against a plain ``LIKE`` scan of the same rows, the first
page of ``tables`` against reading every table, and ``check`` of a 2 kB query against sqlglot's
parse alone (the floor: the checker parses too).
"""

from __future__ import annotations

import functools
import http.server
import io
import json
import random
import statistics
import sys
import threading
import time
from pathlib import Path

import sqlglot

from benchmarks.case6_keys import realistic_adql
from benchmarks.common import MB, CaseResult, Context, Row, run_capture
from jobdesk import checks, metadata
from jobdesk.index import Index

WORDS = ("flux", "mag", "err", "pos", "time", "band", "flag", "id", "ra", "dec", "sigma", "epoch")
UNITS = ("mag", "deg", "mas", "mas/yr", "s", "d", "Jy", "", "")
UCDS = ("phot.mag", "pos.eq.ra", "pos.eq.dec", "stat.error", "meta.id", "time.epoch",
        "phot.flux", "meta.code.qual")


def invented_tableset(tables: int, columns: int, seed: int = 7) -> bytes:
    """A VOSI 1.1 tableset of invented tables (VODataService 1.2 types, with nrows)."""
    rng = random.Random(seed)
    out = io.StringIO()
    out.write('<?xml version="1.0" encoding="UTF-8"?>\n<vosi:tableset '
              'xmlns:vosi="http://www.ivoa.net/xml/VOSITables/v1.0" '
              'xmlns:vs="http://www.ivoa.net/xml/VODataService/v1.1" '
              'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">\n')
    per_schema = 250
    for t in range(tables):
        if t % per_schema == 0:
            if t:
                out.write("</schema>\n")
            out.write(f"<schema><name>sky{t // per_schema:02d}</name>\n")
        out.write(f'<table type="table"><name>sky{t // per_schema:02d}.part_{t:05d}</name>'
                  f"<description>Invented table {t} of the benchmark service, "
                  f"{rng.choice(WORDS)} measurements</description>"
                  f"<nrows>{rng.randint(10, 10**9)}</nrows>\n")
        for c in range(columns):
            word = rng.choice(WORDS)
            out.write(f"<column><name>{word}_{c:02d}</name>"
                      f"<description>invented {word} column {c} of table {t}</description>"
                      f"<unit>{rng.choice(UNITS)}</unit><ucd>{rng.choice(UCDS)}</ucd>"
                      f'<dataType xsi:type="vs:VOTableType">{rng.choice(("double", "float", "long", "char"))}'
                      "</dataType></column>\n")
        out.write("</table>\n")
    out.write("</schema>\n</vosi:tableset>\n")
    return out.getvalue().encode()


class _Quiet(http.server.SimpleHTTPRequestHandler):
    def log_message(self, *args):
        pass


def serve_directory(root: Path):
    handler = functools.partial(_Quiet, directory=str(root))
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return server


def child(mode: str, **args) -> dict:
    out = run_capture([sys.executable, "-m", "benchmarks._rss_child", mode, json.dumps(args)])
    return json.loads(out.strip().splitlines()[-1])


def medians(fn, times: int) -> float:
    values = []
    for _ in range(times):
        started = time.perf_counter()
        fn()
        values.append(time.perf_counter() - started)
    return statistics.median(values)


def run(ctx: Context) -> CaseResult:
    n_tables = 500 if ctx.quick else 5000
    n_columns = 40
    web = ctx.work / "case7-web"
    (web / "tap").mkdir(parents=True)
    doc = invented_tableset(n_tables, n_columns)
    (web / "tap" / "tables").write_bytes(doc)
    server = serve_directory(web)
    ctx.callback(server.shutdown)
    url = f"http://127.0.0.1:{server.server_address[1]}/tap"
    rows: list[Row] = []

    root = ctx.work / "case7-desk"
    ours = child("metadata", root=str(root), url=url)
    whole = child("etree", path=str(web / "tap" / "tables"))
    ctx.log(f"  {n_tables} tables x {n_columns} columns, {len(doc) / MB:.0f} MB of XML: "
            f"jobdesk +{ours['growth_mb']:.0f} MB, ElementTree.parse +{whole['growth_mb']:.0f} MB")
    rows.append(Row("case7", f"peak RSS growth reading {n_tables} tables x {n_columns} columns "
                    f"({len(doc) / MB:.0f} MB VOSI)", ours["growth_mb"], "MB",
                    "ElementTree.parse of the document", whole["growth_mb"],
                    whole["growth_mb"] / max(ours["growth_mb"], 1.0), "less memory",
                    "< 100 MB", ours["growth_mb"] < 100))

    index = Index(root / "index.sqlite")
    sid = url
    n_cols = index.metadata_info(sid)[0]["columns"]
    times = 9 if ctx.quick else 25
    queries = ["flux err", "pos.eq.ra", "invented epoch", "mag_1", "sigma column 3"]
    qi = iter(range(10**9))

    def ours_find():
        text = queries[next(qi) % len(queries)]
        index.meta_find(sid, metadata.fts_query(text), limit=50)

    def like_find():
        # the same question without FTS5: every word somewhere, name hits first, 50 best
        words = queries[next(qi) % len(queries)].split()
        where = " AND ".join("(name LIKE ? OR description LIKE ? OR unit LIKE ? OR ucd LIKE ?)"
                             for _ in words)
        args = [f"%{w}%" for w in words for _ in range(4)]
        index.db.execute(f"SELECT table_name, name FROM meta_columns WHERE service = ? AND "
                         f"{where} ORDER BY (name LIKE ?) DESC LIMIT 50",
                         [sid, *args, f"%{words[0]}%"]).fetchall()

    f_ours, f_like = medians(ours_find, times), medians(like_find, times)
    rows.append(Row("case7", f"find over {n_cols:,} cached columns (median)", f_ours * 1000, "ms",
                    "LIKE scan of the same rows", f_like * 1000, f_like / f_ours, "faster",
                    "< 50 ms", f_ours < 0.050))

    t_page = medians(lambda: index.meta_tables(sid, limit=50), times)
    t_all = medians(lambda: index.meta_tables(sid), max(3, times // 3))
    rows.append(Row("case7", f"first page (50) of tables, {n_tables} tables cached (median)",
                    t_page * 1000, "ms", "all tables from the cache", t_all * 1000,
                    t_all / t_page, "faster", "< 50 ms", t_page < 0.050))

    # check of ~2 kB queries against the demo catalogue's metadata, cached in the same index
    from jobdesk.localtap.engine import Engine
    from jobdesk.localtap.service import tableset_xml
    engine = Engine(ctx.work / "case7-engine", rows=200)
    demo = list(metadata.parse_tableset(io.BytesIO(tableset_xml(engine.tables()).encode()),
                                        on_skip=lambda m: None))
    index.save_metadata("http://demo/tap", demo, source="vosi")
    catalog = metadata.CachedCatalog(index, "http://demo/tap")
    rng = random.Random(7)
    texts = [realistic_adql(rng) for _ in range(40)]
    assert all(not checks.errors(checks.check(t, catalog)) for t in texts)
    ti = iter(range(10**9))
    c_ours = medians(lambda: checks.check(texts[next(ti) % len(texts)],
                                          metadata.CachedCatalog(index, "http://demo/tap")),
                     times * 2)
    c_parse = medians(lambda: sqlglot.parse_one(texts[next(ti) % len(texts)], read="tsql"),
                      times * 2)
    size = statistics.mean(map(len, texts))
    rows.append(Row("case7", f"check of a {size / 1000:.1f} kB query, cached metadata (median)",
                    c_ours * 1000, "ms", "sqlglot.parse_one alone", c_parse * 1000,
                    c_ours / c_parse, "the parser's time", "< 5 ms", c_ours < 0.005))
    index.close()
    return CaseResult(rows, {"tables": n_tables, "columns_per_table": n_columns,
                             "document_bytes": len(doc), "metadata_child": ours,
                             "etree_child": whole})
