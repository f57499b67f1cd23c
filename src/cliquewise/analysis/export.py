"""Exports of a finished run for other tools: group graphs and membership tables.

* :func:`group_graph` and :func:`write_graph`: the ``top`` strongest kept groups and
  their members as a bipartite graph (person nodes joined to group nodes), written
  with networkx's GraphML or GEXF writer. Built on :meth:`cliquewise.Run.to_networkx`.
* :func:`membership_long` and :func:`membership_wide`: who belongs to which kept
  group, as a tidy table (one row per membership) or a node-by-group 0/1 table (one
  column per group), written as Parquet or CSV by :func:`write_table`.

Node ids in the graph files are ``n<node_id>`` for people and ``g<clique_id>`` for
groups, so they never collide with labels and never need quoting. Labels travel as
data, so commas, quotes, newlines, tabs and any unicode survive a round trip;
characters XML 1.0 cannot hold at all (most control characters) are refused with a
message, since silently changing a person's label would be worse. Column meanings
are in ``docs/outputs.md``. Graph files and Parquet tables carry the run's
caution (the model describes interaction patterns, not intent).
"""

from __future__ import annotations

import io
import os
import re
from pathlib import Path

from xml.sax.saxutils import escape as xml_escape

import numpy as np
import pandas as pd

from cliquewise.api import Run

GRAPH_FORMATS = ("graphml", "gexf")
TABLE_FORMATS = ("parquet", "csv")
DEFAULT_TOP = 100

# characters XML 1.0 cannot carry, escaped or not (tab, newline and CR are allowed)
_NOT_XML = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")


class ExportError(ValueError):
    """An export cannot be written as asked (the message says why, in one line)."""


def _open(run) -> Run:
    return run if isinstance(run, Run) else Run(run)


# -- group graphs ------------------------------------------------------------------

def group_graph(run, top: int | None = DEFAULT_TOP, fmt: str = "graphml"):
    """The ``top`` strongest kept groups and their members as a networkx graph.

    Parameters
    ----------
    run : Run or str or Path
        A finished run (or its directory).
    top : int or None
        How many groups, strongest first (by expected weight); ``None`` for all kept
        groups.
    fmt : {"graphml", "gexf"}
        The target format; it decides how labels are carried (below).

    Returns
    -------
    networkx.Graph
        Person nodes ``"n<node_id>"`` with ``kind="person"``, ``node_id`` and
        ``label``; group nodes ``"g<clique_id>"`` with ``kind="group"``,
        ``clique_id``, ``size``, ``intensity`` and ``expected_weight``; one edge per
        membership. In GraphML the label keeps its type (text or integer) and group
        nodes have no label; in GEXF every node has a text label (the person's
        label, or ``"group <clique_id>"``), because GEXF labels are always text.
    """
    import networkx as nx

    if fmt not in GRAPH_FORMATS:
        raise ExportError(f"graph format must be one of {', '.join(GRAPH_FORMATS)}, not {fmt!r}")
    if top is not None and top < 1:
        raise ExportError("--top must be at least 1 (or 'all')")
    run = _open(run)
    src = run.to_networkx(top=top)
    G = nx.Graph(name="cliquewise groups", caution=caution(run))
    for node, data in src.nodes(data=True):
        if data["kind"] == "group":
            cid = int(node[1])
            attrs = {"kind": "group", "clique_id": cid, "size": data["size"], "intensity": data["intensity"],
                     "expected_weight": data["expected_weight"]}
            if fmt == "gexf":
                attrs["label"] = f"group {cid}"
            G.add_node(f"g{cid}", **attrs)
        else:
            label = data["label"]
            if isinstance(label, str) and _NOT_XML.search(label):
                raise ExportError(f"label {label!r} holds characters XML cannot carry; "
                                  f"export the membership table (--format parquet or csv) instead")
            G.add_node(f"n{int(node)}", kind="person", node_id=int(node),
                       label=str(label) if fmt == "gexf" else label)
    for a, b in src.edges():
        person, group = (a, b) if isinstance(b, tuple) else (b, a)
        G.add_edge(f"n{int(person)}", f"g{int(group[1])}")
    return G


def write_graph(run, path, fmt: str = "graphml", top: int | None = DEFAULT_TOP) -> Path:
    """Write :func:`group_graph` to ``path`` (atomically) with networkx's writer.

    Parameters
    ----------
    run : Run or str or Path
    path : str or Path
        The file to write; its folder is created.
    fmt : {"graphml", "gexf"}
    top : int or None
        How many of the strongest kept groups; ``None`` for all.

    Returns
    -------
    Path
        The file written.
    """
    import networkx as nx
    from networkx.readwrite.graphml import GraphMLWriter

    G = group_graph(run, top=top, fmt=fmt)
    buf = io.BytesIO()
    if fmt == "graphml":
        writer = GraphMLWriter(graph=G, encoding="utf-8", prettyprint=True)
        writer.dump(buf)
        # XML parsers turn a raw CR in element text into LF; a character reference keeps it.
        # In UTF-8 the byte 0x0D only ever encodes CR, and ElementTree already escapes it
        # inside attribute values, so every raw 0x0D left is label text.
        data = buf.getvalue().replace(b"\r", b"&#13;")
    else:
        nx.write_gexf(G, buf, encoding="utf-8", prettyprint=True)
        # GEXF has no graph attributes; the caution goes into <meta><description>
        note = f"<description>{xml_escape(G.graph['caution'])}</description></meta>".encode("utf-8")
        data = buf.getvalue().replace(b"</meta>", note, 1)
    return _write_bytes(Path(path), data)


# -- membership tables -------------------------------------------------------------

def _kept_groups(run: Run, top: int | None) -> pd.DataFrame:
    cl = run.cliques(kept_only=True)
    if top is not None:
        if top < 1:
            raise ExportError("--top must be at least 1 (or 'all')")
        cl = cl.head(top)
    return cl


def membership_long(run, top: int | None = None) -> pd.DataFrame:
    """One row per membership of a kept group: the tidy node-by-group table.

    Parameters
    ----------
    run : Run or str or Path
    top : int or None
        Only the ``top`` strongest kept groups; ``None`` (default) for all.

    Returns
    -------
    pandas.DataFrame
        ``node_id``, ``label``, ``clique_id``, ``group_size``, ``group_intensity``,
        sorted by ``node_id`` then ``clique_id``.
    """
    run = _open(run)
    cl = _kept_groups(run, top)
    mem = run.members()
    mem = mem[mem.clique_id.isin(cl.clique_id.to_numpy())]
    info = cl.set_index("clique_id")
    out = pd.DataFrame({
        "node_id": mem.node_id.to_numpy(np.int64),
        "label": mem.label.to_numpy(),
        "clique_id": mem.clique_id.to_numpy(np.int64),
        "group_size": info["size"].reindex(mem.clique_id.to_numpy()).to_numpy(np.int64),
        "group_intensity": info["intensity"].reindex(mem.clique_id.to_numpy()).to_numpy(np.float64),
    })
    return out.sort_values(["node_id", "clique_id"], kind="stable").reset_index(drop=True)


def membership_wide(run, top: int | None = DEFAULT_TOP) -> pd.DataFrame:
    """The node-by-group 0/1 table of the ``top`` strongest kept groups.

    Only people in at least one of those groups get a row, so the table holds at
    most (members of the top groups) x ``top`` cells, never nodes x groups.

    Parameters
    ----------
    run : Run or str or Path
    top : int or None
        How many groups (columns); ``None`` for all kept groups (can be very wide).

    Returns
    -------
    pandas.DataFrame
        ``node_id``, ``label``, ``groups`` (how many of these groups the person is
        in), then one int8 column ``group_<clique_id>`` per group, strongest first;
        rows sorted by ``node_id``.
    """
    run = _open(run)
    cl = _kept_groups(run, top)
    long = membership_long(run, top=top)
    cids = cl.clique_id.to_numpy(np.int64)
    node_ids, row = np.unique(long.node_id.to_numpy(np.int64), return_inverse=True)
    col = pd.Index(cids).get_indexer(long.clique_id.to_numpy(np.int64))
    grid = np.zeros((node_ids.size, cids.size), dtype=np.int8)
    grid[row, col] = 1
    labels = long.drop_duplicates("node_id").set_index("node_id")["label"].reindex(node_ids)
    out = pd.DataFrame({"node_id": node_ids, "label": labels.to_numpy(),
                        "groups": grid.sum(axis=1, dtype=np.int64)})
    cols = pd.DataFrame(grid, columns=[f"group_{c}" for c in cids])
    return pd.concat([out, cols], axis=1)


def write_table(df: pd.DataFrame, path, fmt: str = "parquet", note: str | None = None) -> Path:
    """Write a membership table as Parquet or CSV (UTF-8, quoted as needed), atomically.

    ``note`` (Parquet only) goes into the file's key-value metadata as ``caution``.
    """
    if fmt not in TABLE_FORMATS:
        raise ExportError(f"table format must be one of {', '.join(TABLE_FORMATS)}, not {fmt!r}")
    buf = io.BytesIO()
    if fmt == "parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq

        table = pa.Table.from_pandas(df, preserve_index=False)
        if note:
            table = table.replace_schema_metadata({**(table.schema.metadata or {}), b"caution": note.encode("utf-8")})
        pq.write_table(table, buf)
    else:
        buf.write(df.to_csv(index=False, lineterminator="\n").encode("utf-8"))
    return _write_bytes(Path(path), buf.getvalue())


def default_path(run_dir, fmt: str, top: int | None, layout: str = "long") -> Path:
    """``RUN_DIR/exports/<name>``: where ``cliquewise export`` writes without ``--out``."""
    n = "all" if top is None else str(top)
    if fmt in GRAPH_FORMATS:
        name = f"groups-top{n}.{fmt}"
    else:
        name = f"memberships-{layout}-top{n}.{fmt}"
    return Path(run_dir) / "exports" / name


def export(run_dir, fmt: str, top: int | None = DEFAULT_TOP, out=None, layout: str = "long") -> Path:
    """What ``cliquewise export`` does: one graph file or one membership table.

    Parameters
    ----------
    run_dir : str or Path
    fmt : {"graphml", "gexf", "parquet", "csv"}
        A graph format, or a table format for the membership table.
    top : int or None
        How many of the strongest kept groups; ``None`` for all.
    out : str or Path, optional
        The file to write; ``RUN_DIR/exports/...`` by default (:func:`default_path`).
    layout : {"long", "wide"}
        For tables: one row per membership, or one row per person and a column per group.

    Returns
    -------
    Path
        The file written.
    """
    run = Run(run_dir)
    out = Path(out) if out else default_path(run_dir, fmt, top, layout)
    if fmt in GRAPH_FORMATS:
        return write_graph(run, out, fmt=fmt, top=top)
    if fmt not in TABLE_FORMATS:
        raise ExportError(f"--format must be one of {', '.join(GRAPH_FORMATS + TABLE_FORMATS)}, not {fmt!r}")
    if layout == "long":
        df = membership_long(run, top=top)
    elif layout == "wide":
        df = membership_wide(run, top=top)
    else:
        raise ExportError(f"--layout must be long or wide, not {layout!r}")
    return write_table(df, out, fmt=fmt, note=caution(run))


def caution(run: Run) -> str:
    """The run's caution (``summary.json``), carried by every export that names people."""
    return str(run.summary().get("caution", ""))


def _write_bytes(path: Path, data: bytes) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "wb") as fh:
        fh.write(data)
    os.replace(tmp, path)
    return path
