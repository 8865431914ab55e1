"""Security: parameterised SQL only, paths that stay in their folder, private files, an
append-only event log.

Outside references named beside the checks: the Python ``sqlite3`` module documentation
("How to use placeholders to bind values in SQL queries": never assemble SQL from values
with string operations); the SQLite documentation of CREATE TRIGGER / RAISE(ABORT) and of
the REPLACE conflict resolution ("delete triggers fire if and only if recursive triggers
are enabled"); POSIX ``open(2)`` (``O_NOFOLLOW``, ``O_EXCL``, the ``mode`` argument under
the process umask) and ``stat(2)`` permission bits; the COCO keypoint format
(``images[].file_name`` is a name relative to the image folder).
"""
from __future__ import annotations

import ast
import hashlib
import inspect
import json
import os
import re
import sqlite3
import stat
from pathlib import Path

import numpy as np
import pytest

from conftest import write_image
from kinemark.core import export, ops, review, store as store_mod
from kinemark.core.errors import KinemarkError
from kinemark.core.model import ACCEPTED, DRAFTING
from kinemark.core.project import Project
from kinemark.core.skeleton import COCO17
from kinemark.core.store import DB_NAME, Store

CORE = Path(store_mod.__file__).resolve().parent
APP = CORE.parent / "app" if (CORE.parent / "app").is_dir() else None

# ---- 1. parameterised SQL only ------------------------------------------------------------------
#
# The rule, as the sqlite3 documentation puts it: values reach the database only as bound
# parameters (``?``), never by building the SQL text from them. The check reads the
# abstract syntax tree of core/store.py and follows the SQL text handed to every SQL call:
# ``.execute`` / ``.executemany`` / ``.executescript``, and every private helper that
# passes one of its own parameters on to such a call as SQL text (``_insert(db, sql,
# args)``, the connection adapters' ``execute(sql, args)``); at a helper's call sites the
# argument in that position is checked in turn. SQL text is accepted only when it is
# built from
#   * string literals, and ``+`` / ``+=`` of accepted pieces;
#   * names bound, in the same function, only to accepted pieces;
#   * class or module constants bound to accepted pieces (``self._ANN_SELECT``);
#   * ``"<literal>".join(xs)`` where ``xs`` is a list in the same function that only ever
#     receives accepted pieces (``conds.append("entity=?")``);
#   * inside an f-string, two kinds of replacement field only:
#     ``','.join('?' * len(...))``, which writes "?,?,?" placeholders - the known-safe
#     f-string: it depends on how many values there are, never on what they are; and a
#     name bound by ``_pg_schema_name(...)`` before the call, a schema identifier that
#     function admits only as ``[a-z][a-z0-9_]*`` (identifiers cannot be bound
#     parameters; ``test_schema_identifiers_are_validated`` checks that function);
#   * the result of a function that only rewrites its argument with literal
#     replacements (``_sql``: ``?`` -> ``%s`` for psycopg; ``_pg_ddl``: type names);
#   * the statements of a migration script (``_split_sql`` / ``_migration_statements``):
#     SQL written in the code (MIGRATIONS), not values.
# Anything else - another f-string field, ``%`` formatting, ``.format``, ``str(...)``,
# subscripts, a public method's parameter - is refused, whether or not it happens to be
# safe. A public method that takes SQL text from its caller is refused too: its callers
# are outside this file and cannot be checked here.

SQL_METHODS = {"execute": 0, "executemany": 0, "executescript": 0}
MIGRATION_SOURCES = {"_split_sql", "_migration_statements"}
IDENTIFIER_VALIDATORS = {"_pg_schema_name"}


def _is_placeholder_join(node) -> bool:
    """``','.join('?' * len(x))`` (any separator literal without a quote or ?)."""
    return (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.func.attr == "join"
            and isinstance(node.func.value, ast.Constant) and isinstance(node.func.value.value, str)
            and not re.search(r"['\"?]", node.func.value.value)
            and len(node.args) == 1 and not node.keywords
            and isinstance(node.args[0], ast.BinOp) and isinstance(node.args[0].op, ast.Mult)
            and isinstance(node.args[0].left, ast.Constant) and node.args[0].left.value == "?"
            and isinstance(node.args[0].right, ast.Call) and isinstance(node.args[0].right.func, ast.Name)
            and node.args[0].right.func.id == "len")


def _call_name(call: ast.Call) -> str | None:
    f = call.func
    return f.attr if isinstance(f, ast.Attribute) else f.id if isinstance(f, ast.Name) else None


class _Param(Exception):
    """The SQL text comes from parameter ``name`` of the function being read."""

    def __init__(self, name):
        self.name = name


class SqlTextChecker:
    def __init__(self, tree: ast.Module):
        self.tree = tree
        self.consts: dict[str, list] = {}
        self.functions = []          # (function node, is a method taking self)
        for node in ast.walk(tree):
            if isinstance(node, (ast.Module, ast.ClassDef)):
                for stmt in node.body:
                    if isinstance(stmt, ast.Assign):
                        for t in stmt.targets:
                            if isinstance(t, ast.Name):
                                self.consts.setdefault(t.id, []).append(stmt.value)
                    elif isinstance(stmt, ast.AnnAssign) and isinstance(stmt.target, ast.Name) and stmt.value:
                        self.consts.setdefault(stmt.target.id, []).append(stmt.value)
                    elif isinstance(stmt, (ast.FunctionDef, ast.AsyncFunctionDef)):
                        static = any(isinstance(d, ast.Name) and d.id == "staticmethod"
                                     for d in stmt.decorator_list)
                        self.functions.append((stmt, isinstance(node, ast.ClassDef) and not static))
        self.transparent = {fn.name for fn, _ in self.functions if self._only_rewrites(fn)}

    @staticmethod
    def _only_rewrites(fn) -> bool:
        """Every return is the first parameter rewritten by literal .replace / re.sub calls."""
        args = [a.arg for a in fn.args.args if a.arg not in ("self", "cls")]
        if not args:
            return False
        ok_names = {args[0]}

        def rewritten(e):
            if isinstance(e, ast.Name):
                return e.id in ok_names
            if isinstance(e, ast.Call) and isinstance(e.func, ast.Attribute):
                if e.func.attr == "replace" and all(isinstance(a, ast.Constant) for a in e.args):
                    return rewritten(e.func.value)
                if (e.func.attr == "sub" and isinstance(e.func.value, ast.Name) and e.func.value.id == "re"
                        and len(e.args) == 3 and all(isinstance(a, ast.Constant) for a in e.args[:2])):
                    return rewritten(e.args[2])
            return False
        returns = []
        for node in ast.walk(fn):
            if isinstance(node, ast.Assign):
                if not (len(node.targets) == 1 and isinstance(node.targets[0], ast.Name)
                        and node.targets[0].id in ok_names and rewritten(node.value)):
                    return False
            elif isinstance(node, ast.Return):
                returns.append(node.value)
        return bool(returns) and all(r is not None and rewritten(r) for r in returns)

    @staticmethod
    def _bindings(fn):
        binds: dict[str, list] = {}
        appends: dict[str, list] = {}
        params = [a.arg for a in fn.args.posonlyargs + fn.args.args + fn.args.kwonlyargs]
        for extra in (fn.args.vararg, fn.args.kwarg):
            if extra:
                params.append(extra.arg)
        for node in ast.walk(fn):
            if isinstance(node, ast.Assign):
                for t in node.targets:
                    if (isinstance(t, ast.Tuple) and isinstance(node.value, ast.Tuple)
                            and len(t.elts) == len(node.value.elts)):
                        pairs = list(zip(t.elts, node.value.elts))     # q, args = "SELECT ...", []
                    else:
                        pairs = [(t, node.value)]
                    for tt, val in pairs:
                        for n in ast.walk(tt):
                            if isinstance(n, ast.Name):
                                binds.setdefault(n.id, []).append(
                                    (node.lineno, val if isinstance(tt, ast.Name) else None))
            elif isinstance(node, ast.AugAssign) and isinstance(node.target, ast.Name):
                binds.setdefault(node.target.id, []).append(
                    (node.lineno, node.value if isinstance(node.op, ast.Add) else None))
            elif isinstance(node, (ast.For, ast.comprehension)):
                for n in ast.walk(node.target):
                    if isinstance(n, ast.Name):
                        binds.setdefault(n.id, []).append((getattr(node, "lineno", 0), ("for", node.iter)))
            elif isinstance(node, ast.withitem) and node.optional_vars is not None:
                for n in ast.walk(node.optional_vars):
                    if isinstance(n, ast.Name):
                        binds.setdefault(n.id, []).append((0, None))
            elif isinstance(node, ast.NamedExpr):
                binds.setdefault(node.target.id, []).append((0, node.value))
            elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
                  and isinstance(node.func.value, ast.Name)):
                if node.func.attr == "append" and len(node.args) == 1:
                    appends.setdefault(node.func.value.id, []).append(node.args[0])
                elif node.func.attr in ("extend", "insert", "__setitem__", "__iadd__"):
                    appends.setdefault(node.func.value.id, []).append(None)
        return binds, appends, params

    def _validated(self, name, env, line) -> bool:
        """``name`` holds an identifier checked by a validator before ``line``."""
        binds, _, _ = env
        vals = binds.get(name, [])
        return bool(vals) and all(
            isinstance(v, ast.Call) and _call_name(v) in IDENTIFIER_VALIDATORS and ln < line for ln, v in vals)

    def safe(self, node, env, line, depth=0) -> str | None:
        """None if the SQL text is built only from code; else why not. Raises _Param when it
        is (part of) a parameter of the function being read."""
        if depth > 30:
            return "too deep to follow"
        binds, appends, params = env
        if isinstance(node, ast.Constant):
            return None if isinstance(node.value, str) else f"a {type(node.value).__name__} constant"
        if isinstance(node, ast.JoinedStr):
            for part in node.values:
                if isinstance(part, ast.FormattedValue):
                    v = part.value
                    if part.conversion != -1 or part.format_spec is not None:
                        return f"f-string field {{{ast.unparse(v)}}} with a conversion or format"
                    if _is_placeholder_join(v):
                        continue
                    if isinstance(v, ast.Name) and self._validated(v.id, env, line):
                        continue
                    return f"f-string field {{{ast.unparse(v)}}}"
            return None
        if isinstance(node, ast.IfExp):
            return self.safe(node.body, env, line, depth + 1) or self.safe(node.orelse, env, line, depth + 1)
        if isinstance(node, ast.BinOp):
            if isinstance(node.op, ast.Mod):
                return "%-formatting"
            if isinstance(node.op, ast.Add):
                return self.safe(node.left, env, line, depth + 1) or self.safe(node.right, env, line, depth + 1)
            return f"operator {type(node.op).__name__}"
        if isinstance(node, ast.Call):
            name = _call_name(node)
            if name == "format":
                return ".format(...)"
            if name in self.transparent and len(node.args) == 1:
                return self.safe(node.args[0], env, line, depth + 1)
            if (name == "join" and isinstance(node.func, ast.Attribute) and isinstance(node.func.value, ast.Constant)
                    and isinstance(node.func.value.value, str) and len(node.args) == 1
                    and isinstance(node.args[0], ast.Name)):
                lst = node.args[0].id
                values = binds.get(lst, [])
                if not values or lst in params:
                    return f"join over {lst}, which is not a local list"
                for _, v in values:
                    if not isinstance(v, ast.List):
                        return f"join over {lst}, bound to something other than a list literal"
                    for elt in v.elts:
                        why = self.safe(elt, env, line, depth + 1)
                        if why:
                            return f"{lst} holds {why}"
                for v in appends.get(lst, []):
                    why = "an extend/insert" if v is None else self.safe(v, env, line, depth + 1)
                    if why:
                        return f"{lst} receives {why}"
                return None
            return f"call {ast.unparse(node.func)}(...)"
        if isinstance(node, ast.Name):
            values = binds.get(node.id)
            if node.id in params and not values:
                raise _Param(node.id)
            if values is None:
                consts = self.consts.get(node.id)
                if not consts:
                    return f"unknown name {node.id}"
                values = [(0, c) for c in consts]
            if node.id in params:
                return f"parameter {node.id}, rebound"
            for _, v in values:
                if v is None:
                    return f"{node.id} is bound by something that is not followed"
                if isinstance(v, tuple) and v[0] == "for":
                    it = v[1]
                    if isinstance(it, ast.Call) and _call_name(it) in MIGRATION_SOURCES:
                        continue          # statements of a migration script written in the code
                    return f"{node.id} iterates over {ast.unparse(it)}"
                why = self.safe(v, env, line, depth + 1)
                if why:
                    return f"{node.id} = {why}"
            return None
        if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                and node.value.id in ("self", "cls", "Store")):
            consts = self.consts.get(node.attr)
            if not consts:
                return f"attribute {node.attr} is not a class constant"
            for v in consts:
                why = self.safe(v, env, line, depth + 1)
                if why:
                    return f"{node.attr} = {why}"
            return None
        return f"expression {ast.unparse(node)[:60]}"

    def _sql_arg(self, call, sinks):
        """The SQL text argument of a call to a sink, or None when it is not a sink call."""
        name = _call_name(call)
        if name not in sinks:
            return None
        pos, kw = sinks[name]
        for k in call.keywords:
            if k.arg == kw:
                return k.value
        if isinstance(call.func, ast.Attribute) and call.func.attr in SQL_METHODS:
            pos = 0
        return call.args[pos] if pos < len(call.args) else None

    def problems(self) -> tuple[list[str], int]:
        sinks = {n: (0, "sql") for n in SQL_METHODS}
        envs = [(fn, is_method, self._bindings(fn)) for fn, is_method in self.functions]
        for _ in range(10):          # helpers that pass their SQL on become sinks; to a fixed point
            grown = False
            for fn, is_method, env in envs:
                for call in ast.walk(fn):
                    if not isinstance(call, ast.Call):
                        continue
                    arg = self._sql_arg(call, sinks)
                    if arg is None:
                        continue
                    try:
                        self.safe(arg, env, call.lineno)
                    except _Param as p:
                        names = env[2]
                        i = names.index(p.name) - (1 if is_method else 0)
                        if fn.name not in sinks:
                            sinks[fn.name] = (i, p.name)
                            grown = True
            if not grown:
                break
        out, n = [], 0
        for fn, is_method, env in envs:
            for call in ast.walk(fn):
                if not isinstance(call, ast.Call) or _call_name(call) not in sinks:
                    continue
                n += 1
                arg = self._sql_arg(call, sinks)
                if arg is None:
                    out.append(f"line {call.lineno}: {_call_name(call)}() without SQL text")
                    continue
                try:
                    why = self.safe(arg, env, call.lineno)
                except _Param as p:
                    if fn.name.startswith("_") or fn.name in SQL_METHODS:
                        continue          # a private helper: its call sites are checked instead
                    why = f"public method {fn.name} taking SQL text from its parameter {p.name}"
                if why:
                    out.append(f"line {call.lineno} in {fn.name}: SQL text built from {why}")
        return out, n


def _check_source(src: str):
    return SqlTextChecker(ast.parse(src)).problems()


def test_store_builds_sql_text_only_from_code():
    src = Path(store_mod.__file__).read_text(encoding="utf-8")
    problems, n = _check_source(src)
    assert n >= 40, f"only {n} execute calls found: has the store moved its SQL elsewhere?"
    assert problems == []


UNSAFE = {
    "f-string value": 'def f(db, name):\n    db.execute(f"SELECT id FROM users WHERE name = \'{name}\'")\n',
    "percent": 'def f(db, name):\n    db.execute("SELECT id FROM users WHERE name = \'%s\'" % name)\n',
    "format": 'def f(db, name):\n    db.execute("SELECT id FROM users WHERE name = \'{}\'".format(name))\n',
    "concatenated value": 'def f(db, name):\n    q = "SELECT id FROM users WHERE name = " + name\n    db.execute(q)\n',
    "parameter as SQL": 'def f(db, sql):\n    db.execute(sql)\n',
    "joined values": ('def f(db, ids):\n'
                      '    db.execute(f"SELECT 1 FROM t WHERE id IN ({\',\'.join(str(i) for i in ids)})")\n'),
    "quoted join": "def f(db, ids):\n    db.execute(f'''SELECT 1 FROM t WHERE id IN ({\"','\".join('?' * len(ids))})''')\n",
    "list fed a value": ('def f(db, col):\n    conds = []\n    conds.append(col + "=?")\n'
                         '    db.execute("SELECT 1 FROM t WHERE " + " AND ".join(conds))\n'),
    "str() of a value": 'def f(db, n):\n    db.execute("SELECT 1 LIMIT " + str(n))\n',
    "format spec": 'def f(db, ids):\n    db.execute(f"SELECT {\',\'.join(\'?\' * len(ids))!r}")\n',
    "helper fed a value": ('class S:\n    def _insert(self, db, sql, args=()):\n'
                           '        return db.execute(sql + " RETURNING id", args)\n'
                           '    def add(self, db, name):\n        self._insert(db, "INSERT INTO t(n) VALUES (\'" + name + "\')")\n'),
    "public pass-through": 'class S:\n    def run_sql(self, sql):\n        return self._db.execute(sql)\n',
    "identifier not validated": ('def f(conn, schema):\n    conn.execute(f\'SET search_path TO "{schema}"\')\n'),
    "validated too late": ('def f(conn, name):\n    conn.execute(f\'CREATE SCHEMA "{schema}"\')\n'
                           '    schema = _pg_schema_name(name)\n'),
    "rewrite adding text": ('def _sql(sql):\n    return sql + " WHERE 1"\n'
                            'def f(db, name):\n    db.execute(_sql(name))\n'),
}
SAFE = {
    "placeholders": 'def f(db, ids):\n    db.execute(f"SELECT 1 FROM t WHERE id IN ({\',\'.join(\'?\' * len(ids))})", ids)\n',
    "conditions": ('def f(db, a, b):\n    q, args, conds = "SELECT 1 FROM t", [], []\n'
                   '    if a:\n        conds.append("a=?"); args.append(a)\n'
                   '    if conds:\n        q += " WHERE " + " AND ".join(conds)\n    db.execute(q, args)\n'),
    "class constant": ('class S:\n    _SEL = "SELECT id FROM t"\n'
                       '    def f(self, i):\n        self._db.execute(self._SEL + " WHERE id=?", (i,))\n'),
    "private helper": ('class S:\n    def _insert(self, db, sql, args=()):\n'
                       '        return db.execute(sql + " RETURNING id", args)\n'
                       '    def add(self, db, name):\n        self._insert(db, "INSERT INTO t(n) VALUES (?)", (name,))\n'),
    "validated identifier": ('def f(conn, name):\n    schema = _pg_schema_name(name)\n'
                             '    conn.execute(f\'CREATE SCHEMA "{schema}"\')\n'),
    "placeholder rewrite": ('def _sql(sql):\n    return sql.replace("%", "%%").replace("?", "%s")\n'
                            'def f(db, n):\n    db.execute(_sql("SELECT 1 WHERE n=?"), (n,))\n'),
}


@pytest.mark.parametrize("name", sorted(UNSAFE))
def test_the_sql_check_refuses_text_built_from_values(name):
    problems, n = _check_source(UNSAFE[name])
    assert n >= 1 and len(problems) == 1, problems


@pytest.mark.parametrize("name", sorted(SAFE))
def test_the_sql_check_accepts_placeholders(name):
    problems, n = _check_source(SAFE[name])
    assert n >= 1 and problems == []


@pytest.mark.parametrize("name,ok", [("quillon_bay", True), ("qb2026_rehab", True), ("Quillon", False),
                                     ('x"; DROP SCHEMA public CASCADE; --', False), ("a b", False),
                                     ("", False), ("1st", False), ('qb"', False), ("a" * 64, False)])
def test_schema_identifiers_are_validated(name, ok):
    """The one value the store writes into SQL text (a PostgreSQL schema name cannot be a
    bound parameter) must be a plain lower-case identifier, so it cannot close its quotes."""
    if ok:
        assert store_mod._pg_schema_name(name) == name
    else:
        with pytest.raises(KinemarkError):
            store_mod._pg_schema_name(name)


def test_only_the_store_speaks_sqlite():
    """DEVELOPERS.md: store.py is the only module that speaks SQL."""
    offenders = []
    for folder in [CORE] + ([APP] if APP else []):
        for f in folder.rglob("*.py"):
            if f.name == "store.py" and f.parent == CORE:
                continue
            tree = ast.parse(f.read_text(encoding="utf-8"))
            for node in ast.walk(tree):
                names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                         else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
                if any(n.split(".")[0] == "sqlite3" for n in names):
                    offenders.append(str(f.relative_to(CORE.parent)))
    assert offenders == []


SQLISH = ["o'brien", 'x"); DROP TABLE events; --', "QB-01'); DELETE FROM annotations; --", "%s %d {0} ?",
          "Robert'); UPDATE users SET role='admin' WHERE ('1'='1"]


def test_quotes_and_sql_in_values_are_stored_as_text(project, tmp_path):
    """Values that are SQL fragments go in and come back as text; no table is touched."""
    s = project.store
    for n, text in enumerate(SQLISH):
        u = s.add_user(text, "annotator")
        assert s.user(u.id).name == text.strip()
        assert s.participant(text, create=True).code == text
        s.set_meta(f"note {n}; {text}", text)
        assert s.get_meta(f"note {n}; {text}") == text
    img = write_image(tmp_path / "it's; DROP TABLE media; --.png")
    ch, _ = ops.add_media(project, [img], participant=SQLISH[2])
    m = s.all_media()[0]
    assert m.display_name == img.name and m.participant_code == SQLISH[2]
    k = np.column_stack([np.full(17, 10.0), np.full(17, 12.0), np.full(17, 2)])
    a = s.save_annotation(ch.frames[0], k, ["human"] * 17, state=DRAFTING, user_id=1)
    note = s.add_review_note(a.id, 3, SQLISH[1], user_id=1)
    assert s.review_notes([a.id])[0].text == SQLISH[1] == note.text
    assert s.integrity_check() == "ok"
    assert len(s.users()) == 1 + len(SQLISH) and len(s.events()) > 10
    assert all(u.role == "annotator" for u in s.users()[1:])


# ---- 2. paths stay in their folder ----------------------------------------------------------------

@pytest.fixture
def folders(tmp_path):
    """An image folder with one good image, links leading out of it, and an outside image."""
    root = tmp_path / "images"
    (root / "sub").mkdir(parents=True)
    outside = tmp_path / "outside"
    outside.mkdir()
    write_image(root / "good.png", size=(64, 48), seed=1)
    write_image(root / "sub" / "also.png", size=(64, 48), seed=2)
    secret = write_image(outside / "secret.png", size=(64, 48), seed=3)
    os.symlink(secret, root / "link_to_secret.png")
    os.symlink(outside, root / "linked_dir")
    os.symlink(outside / "not_there.png", root / "dangling.png")
    os.symlink(Path("..") / "outside" / "secret.png", root / "relative_link.png")
    return root, outside, secret


ESCAPES = ["../outside/secret.png", "sub/../../outside/secret.png", "link_to_secret.png",
           "linked_dir/secret.png", "relative_link.png", "dangling.png", "..\\outside\\secret.png",
           "C:\\outside\\secret.png", "\\\\clinic-share\\outside\\secret.png", "good.png\x00../../secret.png",
           "/etc/passwd", "SECRET_ABSOLUTE"]


def _coco_file(tmp_path, names):
    k = np.column_stack([np.full(17, 20.0), np.full(17, 20.0), np.full(17, 2)]).ravel().tolist()
    images = [{"id": i + 1, "file_name": n, "width": 64, "height": 48} for i, n in enumerate(names)]
    anns = [{"id": 100 + i, "image_id": i + 1, "category_id": 1, "keypoints": k, "iscrowd": 0}
            for i in range(len(names))]
    cats = [{"id": 1, "name": "person", "keypoints": list(COCO17.keypoints)}]
    f = tmp_path / "labels.json"
    f.write_text(json.dumps({"images": images, "annotations": anns, "categories": cats}))
    return f


@pytest.mark.parametrize("name", ESCAPES)
def test_import_never_reads_outside_the_image_folder(project, tmp_path, folders, name):
    root, outside, secret = folders
    if name == "SECRET_ABSOLUTE":
        name = str(secret)
    f = _coco_file(tmp_path, ["good.png", name])
    n_events = len(project.store.events())
    with pytest.raises(KinemarkError, match="image id 2.file_name"):
        ops.import_coco(project, f, root, policy="refuse")
    assert project.store.frame_count() == 0 and len(project.store.events()) == n_events
    ch, plan = ops.import_coco(project, f, root, policy="skip")
    assert len(ch.media) == 1 and len(ch.annotations) == 1
    assert any(p.where.startswith("image id 2") for p in plan.problems)
    secret_sha = hashlib.sha256(secret.read_bytes()).hexdigest()
    for m in project.store.all_media():
        assert m.sha256 != secret_sha
        project.media_path(m).resolve().relative_to(root.resolve())   # raises if outside


def test_added_media_paths_lead_back_to_the_files_given(project, tmp_path, folders):
    """add_media takes paths a person chose; whatever their form (``..``, a link out of the
    project, absolute), the stored path must lead back to the same file, and a stored
    relative path must stay inside the project."""
    root, outside, secret = folders
    inside = project.root / "media"
    inside.mkdir()
    write_image(inside / "in.png", seed=5)
    os.symlink(outside / "secret.png", project.root / "link.png")
    given = [project.root / "media" / ".." / "media" / "in.png", project.root / "link.png",
             project.root / ".." / "images" / "good.png"]
    ch, rep = ops.add_media(project, given)
    assert len(rep.added) == 3
    for path, mid, _ in rep.added:
        m = project.store.media(mid)
        assert project.media_path(m).resolve() == Path(path).resolve()
        if m.path_base == "project":
            assert ".." not in Path(m.path).parts
            project.media_path(m).resolve().relative_to(project.root)


def _accepted_project(tmp_path, n=4):
    p = Project.create(tmp_path / "study", COCO17, owner="qb_admin")
    review.add_member(p, "qb_ra_noor", "annotator", by="qb_admin")
    review.add_member(p, "qb_rev_tamsin", "reviewer", by="qb_admin")
    imgs = [write_image(tmp_path / f"qb{i:02d}.png", size=(64, 48), seed=10 + i) for i in range(n)]
    for i, img in enumerate(imgs):
        ops.add_media(p, [img], participant=f"QB-{i:02d}")
    k = np.column_stack([np.linspace(5, 60, 17), np.linspace(5, 44, 17), np.full(17, 2)])
    for f in p.store.frames():
        review.edit(p, f.id, k, ["human"] * 17, user="qb_ra_noor")
        a = p.store.annotation(f.id)
        review.submit(p, a.id, user="qb_ra_noor")
        review.accept(p, a.id, user="qb_rev_tamsin")
    return p


def _snapshot(folder: Path) -> dict:
    return {q: (q.read_bytes() if q.is_file() else None, stat.S_IMODE(os.lstat(q).st_mode))
            for q in sorted(folder.rglob("*"))}


def test_bundle_writes_never_leave_the_bundle(tmp_path):
    p = _accepted_project(tmp_path)
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "keep.txt").write_text("the clinic's own file")
    b = export._Bundle(tmp_path / "b0")
    (tmp_path / "b0").mkdir()
    os.symlink(outside, tmp_path / "b0" / "train")
    os.symlink(outside / "keep.txt", tmp_path / "b0" / "README.txt")
    os.symlink(outside / "nothing_yet.txt", tmp_path / "b0" / "manifest.json")
    for rel in ("train/coco_train.json", "README.txt", "manifest.json", "../outside/keep.txt",
                str(outside / "keep.txt"), "train/../../outside/keep.txt"):
        with pytest.raises(KinemarkError, match="leave the export folder"):
            b.path(rel)
        with pytest.raises(KinemarkError, match="leave the export folder"):
            b.write(rel, b"x")
    before = _snapshot(outside)
    # a folder holding links (or anything else) is refused as not empty
    with pytest.raises(KinemarkError, match="not empty"):
        export.export_bundle(p, tmp_path / "b0", user="qb_admin")
    out = tmp_path / "b1"
    export.export_bundle(p, out, user="qb_admin")
    for q in out.rglob("*"):
        assert not q.is_symlink()
        q.resolve().relative_to(out.resolve())
    assert _snapshot(outside) == before
    p.close()


def test_coco_export_frames_are_not_written_through_links(tmp_path):
    """A link planted in the frames folder under the name of a frame must not lead the
    export to overwrite (or change the permissions of) a file outside it (``O_NOFOLLOW``)."""
    p = _accepted_project(tmp_path, n=2)
    outside = tmp_path / "outside"
    outside.mkdir()
    victim = outside / "victim.png"
    victim.write_bytes(b"the clinic's own file")
    os.chmod(victim, 0o644)
    imgs = tmp_path / "frames"
    imgs.mkdir()
    from kinemark.core import coco
    r = p.store.export_rows([ACCEPTED])[0]
    os.symlink(victim, imgs / coco.frame_file_name(r[6], r[7]))
    with pytest.raises(KinemarkError, match="link"):
        ops.export_coco(p, tmp_path / "out.json", images_to=imgs)
    assert victim.read_bytes() == b"the clinic's own file"
    assert stat.S_IMODE(victim.stat().st_mode) == 0o644
    p.close()


# ---- 3. private files ----------------------------------------------------------------------------

@pytest.fixture
def open_umask():
    """umask 000: a file is private only if the code asks for it (open(2) mode, chmod),
    not because the process happens to run with a strict umask."""
    old = os.umask(0)
    yield
    os.umask(old)


def _private(path: Path) -> bool:
    return stat.S_IMODE(os.stat(path).st_mode) & 0o077 == 0


def test_project_database_and_its_journal_files_are_private(tmp_path, open_umask):
    p = Project.create(tmp_path / "p", COCO17, owner="qb_admin")
    img = write_image(tmp_path / "x.png")
    ch, _ = ops.add_media(p, [img])
    p.store.save_annotation(ch.frames[0], np.zeros((17, 3)), ["human"] * 17, state=DRAFTING)
    files = sorted((tmp_path / "p").glob(DB_NAME + "*"))
    assert {f.name for f in files} >= {DB_NAME, DB_NAME + "-wal", DB_NAME + "-shm"}
    for f in files:
        assert _private(f), f"{f.name} is {oct(stat.S_IMODE(f.stat().st_mode))}"
    p.close()
    for f in (tmp_path / "p").glob(DB_NAME + "*"):
        assert _private(f)


def test_exports_are_private(tmp_path, open_umask):
    p = _accepted_project(tmp_path, n=3)
    out, imgs = tmp_path / "coco" / "labels.json", tmp_path / "coco" / "frames"
    ops.export_coco(p, out, images_to=imgs)
    assert _private(out)
    frames = list(imgs.iterdir())
    assert len(frames) == 3 and all(_private(f) for f in frames)
    res = tmp_path / "results.json"
    ops.export_coco(p, res, fmt="coco-results", states=[])
    assert _private(res)
    bundle = tmp_path / "bundle"
    export.export_bundle(p, bundle, user="qb_admin")
    for q in [bundle, *bundle.rglob("*")]:
        mode = stat.S_IMODE(q.stat().st_mode)
        assert mode == (0o700 if q.is_dir() else 0o600), (q, oct(mode))
    p.close()


def test_export_over_an_existing_file_makes_it_private(tmp_path):
    """open(2) applies ``mode`` only when it creates the file: writing over an existing
    world-readable file must still leave it readable by the user only."""
    p = _accepted_project(tmp_path, n=1)
    out = tmp_path / "labels.json"
    out.write_text("old")
    os.chmod(out, 0o644)
    ops.export_coco(p, out)
    assert _private(out) and json.loads(out.read_text())["annotations"]
    p.close()


# ---- 4. the event log is append-only ---------------------------------------------------------------

_EVENT_WRITES = re.compile(r"\b(UPDATE\s+(OR\s+\w+\s+)?events\b|DELETE\s+FROM\s+events\b|REPLACE\s+INTO\s+events\b"
                           r"|INSERT\s+OR\s+\w+\s+INTO\s+events\b|DROP\s+(TABLE|TRIGGER)\s+(IF\s+EXISTS\s+)?events)",
                           re.IGNORECASE)


def _UPSERTS_EVENTS(text: str) -> bool:
    """An upsert's DO UPDATE changes the existing row (SQLite and PostgreSQL: INSERT ... ON CONFLICT)."""
    return bool(re.search(r"INTO\s+events\b.*ON\s+CONFLICT.*DO\s+UPDATE", text, re.IGNORECASE | re.DOTALL))


def test_no_sql_in_the_store_changes_or_removes_events():
    """Every string in core/store.py that mentions the events table either reads it, inserts a
    new row (plain INSERT INTO events), or defines the append-only triggers."""
    src = Path(store_mod.__file__).read_text(encoding="utf-8")
    texts = [n.value for n in ast.walk(ast.parse(src)) if isinstance(n, ast.Constant) and isinstance(n.value, str)]
    mentions = [t for t in texts if re.search(r"\bevents\b", t, re.IGNORECASE)]
    assert any("INSERT INTO events" in t for t in mentions)       # the check sees the store's SQL
    assert [t for t in mentions if _EVENT_WRITES.search(t) or _UPSERTS_EVENTS(t)] == []
    # and the check itself finds such statements
    for bad in ("UPDATE events SET action='x'", "delete from events where id=1", "REPLACE INTO events VALUES (1)",
                "INSERT OR REPLACE INTO events(id) VALUES (1)", "UPDATE OR IGNORE events SET at=''",
                "DROP TRIGGER events_append_only_update"):
        assert _EVENT_WRITES.search(bad), bad
    assert _UPSERTS_EVENTS("INSERT INTO events(id, at) VALUES (?, ?) ON CONFLICT (id) DO UPDATE SET at = excluded.at")
    assert not _UPSERTS_EVENTS("INSERT INTO meta(key, value) VALUES (?, ?) ON CONFLICT (key) DO UPDATE SET value = 1")


def _writers():
    """Store methods that open a transaction: the ones that can write."""
    return sorted(n for n, f in inspect.getmembers(Store, inspect.isfunction)
                  if not n.startswith("_") and n != "tx" and "self.tx()" in inspect.getsource(f))


def test_every_store_write_leaves_the_event_log_a_prefix(tmp_path, monkeypatch):
    """Run every writing Store method; after each, the log read before must be the first rows
    of the log read after, unchanged (rows only ever get appended)."""
    called = set()
    writers = _writers()
    assert {"save_annotation", "transition_state", "add_media"} <= set(writers)
    for name in writers:
        real = getattr(Store, name)

        def wrap(self, *a, __real=real, __name=name, **k):
            called.add(__name)
            return __real(self, *a, **k)
        monkeypatch.setattr(Store, name, wrap)
    p = Project.create(tmp_path / "p", COCO17, owner="qb_admin")
    s = p.store
    log = s.events()

    def step(fn, *a, **k):
        nonlocal log
        out = fn(*a, **k)
        now = s.events()
        assert now[:len(log)] == log, f"{fn.__name__} changed earlier events"
        assert len(now) >= len(log)
        log = now
        return out

    k = np.column_stack([np.full(17, 10.0), np.full(17, 12.0), np.full(17, 2)])
    img = write_image(tmp_path / "a.png")
    ann = step(s.add_user, "qb_ra_noor", "annotator")
    step(s.set_meta, "study", "Quillon Bay reach-to-target")
    step(s.add_skeleton, COCO17.__class__.from_dict({**COCO17.to_dict(), "name": "coco17-copy"}, source="test"))
    part = step(s.participant, "QB-01", create=True)
    sess = step(s.session, part.id, 1, create=True)
    m, fids = step(s.add_media, session_id=sess.id, kind="image", path="a.png", path_base="project",
                   sha256=hashlib.sha256(img.read_bytes()).hexdigest(), fps=None, frame_count=1,
                   width=64, height=48, frames=[(0, None, "x")])
    step(s.update_frame_checksums, m.id, {0: "y"})
    step(s.set_media_status, m.id, "changed")
    step(s.bulk_insert_frames, m.id, [(1, None, "z"), (2, None, "w")])
    a = step(s.save_annotation, fids[0], k, ["human"] * 17, state=DRAFTING, user_id=ann.id)
    a = step(s.set_state, a.id, "in_review", user_id=ann.id)
    a = step(s.transition_state, a.id, DRAFTING, from_state="in_review", transition="recall", user_id=ann.id)
    step(s.add_review_note, a.id, 2, "left wrist is off the target", user_id=1)
    step(s.address_review_notes, a.id, user_id=ann.id)
    step(s.save_proposal, fids[0], model_id="m", model_hash="h", keypoints=k, confidence=np.ones(17),
         signals={}, score=0.5)
    step(s.save_proposal, fids[0], model_id="m+tuned", model_hash="t1", keypoints=k, confidence=np.ones(17),
         signals={}, score=0.5, adapted=True)
    assert step(s.drop_tuned_proposals, [fids[0]], "t2") == 1
    step(s.set_agreement_frames, [fids[0]], seed=1, share=0.1, user_id=1)
    step(s.save_second_label, fids[0], k, user_id=1)
    step(s.log_event, "export", "bundle", None, None, {"n": 1})
    step(s.claim_frames, ann.id, fids, 1, 60.0)
    step(s.release_claims, ann.id)
    f2 = s.frame_ids(m.id)[1]
    step(s.bulk_insert_annotations, [(f2, k, ACCEPTED)])
    step(s.delete_annotation, s.annotation(f2).id)
    step(s.migrate, store_mod.MIGRATIONS + ["CREATE TABLE reliability_probe (x INTEGER);"])
    assert called == set(writers), (
        f"Store writer(s) {sorted(set(writers) - called)} not exercised here: add them to this test "
        "so that the append-only check covers them")
    p.close()


def test_triggers_refuse_update_and_delete_of_events(project):
    db = project.store._db
    n = len(project.store.events())
    for sql in ("UPDATE events SET action='forged' WHERE id=1", "UPDATE events SET at=at",
                "DELETE FROM events WHERE id=(SELECT MAX(id) FROM events)", "DELETE FROM events"):
        with pytest.raises(sqlite3.DatabaseError, match="append-only"):
            db.execute(sql)
    assert len(project.store.events()) == n and project.store.events()[0].action == "migrate"


def test_triggers_refuse_replacing_an_event(project):
    db = project.store._db
    first = project.store.events()[0]
    try:
        db.execute("INSERT OR REPLACE INTO events(id, at, user_id, action, entity) VALUES (?, ?, NULL, 'forged', 'x')",
                   (first.id, first.at))
    except sqlite3.DatabaseError as e:
        assert "append-only" in str(e)
    assert project.store.events()[0] == first
