"""Offline API documentation: a small page that renders ``/openapi.json`` in the browser.

The page, its script and its style are served by the service itself and the Content-Security-
Policy allows nothing else, so the docs work on a machine with no way out to the internet and
never leak a visit to a third party.
"""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import HTMLResponse, Response

__all__ = ["CSP", "router"]

CSP = "default-src 'self'; img-src 'self' data:; base-uri 'none'; form-action 'none'"

router = APIRouter(include_in_schema=False)

_PAGE = """<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Cuebank API</title>
<link rel="stylesheet" href="/docs/docs.css">
<script src="/docs/docs.js" defer></script>
</head>
<body>
<header><h1 id="title">Cuebank API</h1><p id="intro"></p>
<p><a href="/openapi.json">openapi.json</a></p></header>
<nav id="toc"></nav>
<main id="ops"><p>Loading /openapi.json&hellip;</p></main>
</body>
</html>
"""

_STYLE = """
body { font: 15px/1.5 system-ui, sans-serif; margin: 0 auto; max-width: 980px; padding: 1rem;
       color: #1d2630; }
h1 { margin-bottom: .2rem; } h2 { border-bottom: 1px solid #ccd; margin-top: 2rem; }
nav a { margin-right: 1rem; }
details { border: 1px solid #d6dbe3; border-radius: 6px; margin: .5rem 0; padding: .3rem .7rem; }
summary { cursor: pointer; }
.method { display: inline-block; min-width: 4.5rem; font-weight: 700; font-family: monospace; }
.get { color: #1565c0; } .post { color: #2e7d32; } .put { color: #ef6c00; }
.patch { color: #6a1b9a; } .delete { color: #c62828; }
code, pre { font-family: ui-monospace, monospace; font-size: 13px; }
pre { background: #f4f6f9; padding: .6rem; overflow-x: auto; border-radius: 4px; }
table { border-collapse: collapse; } td, th { text-align: left; padding: .2rem .6rem .2rem 0; }
.status { font-weight: 700; }
"""

_SCRIPT = r"""
"use strict";
const METHODS = ["get", "post", "put", "patch", "delete"];

function el(tag, attrs, ...children) {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, v);
  for (const c of children) node.append(c instanceof Node ? c : String(c));
  return node;
}

function resolve(spec, schema) {
  // Follow one local $ref so a body shows its model's name and members.
  if (schema && schema.$ref) {
    const name = schema.$ref.split("/").pop();
    return [name, spec.components.schemas[name] || {}];
  }
  return [null, schema || {}];
}

function schemaBlock(spec, schema) {
  const [name, body] = resolve(spec, schema);
  const wrap = el("div");
  if (name) wrap.append(el("p", {}, "Model: ", el("code", {}, name)));
  if (body.properties) {
    const table = el("table", {}, el("tr", {}, el("th", {}, "member"), el("th", {}, "about")));
    const required = new Set(body.required || []);
    for (const [member, prop] of Object.entries(body.properties)) {
      const about = (prop.description || prop.title || "") +
        (required.has(member) ? " (required)" : "");
      table.append(el("tr", {}, el("td", {}, el("code", {}, member)), el("td", {}, about)));
    }
    wrap.append(table);
  }
  return wrap;
}

function examplesBlock(content) {
  const wrap = el("div");
  for (const [media, entry] of Object.entries(content || {})) {
    const examples = entry.examples ||
      (entry.example !== undefined ? {example: {value: entry.example}} : {});
    for (const [name, ex] of Object.entries(examples)) {
      const value = typeof ex.value === "string" ? ex.value : JSON.stringify(ex.value, null, 2);
      wrap.append(el("p", {}, el("code", {}, media), " \u2014 ", ex.summary || name));
      wrap.append(el("pre", {}, value));
    }
  }
  return wrap;
}

function operation(spec, path, method, op) {
  const box = el("details", {id: op.operationId || (method + path)});
  box.append(el("summary", {}, el("span", {class: "method " + method}, method.toUpperCase()),
                el("code", {}, path), " \u2014 ", op.summary || ""));
  if (op.description) box.append(el("p", {}, op.description));
  if (op.parameters && op.parameters.length) {
    const table = el("table", {}, el("tr", {}, el("th", {}, "parameter"), el("th", {}, "in"),
                                    el("th", {}, "about")));
    for (const p of op.parameters) {
      table.append(el("tr", {}, el("td", {}, el("code", {}, p.name)), el("td", {}, p.in),
                      el("td", {}, p.description || (p.schema && p.schema.description) || "")));
    }
    box.append(el("h4", {}, "Parameters"), table);
  }
  if (op.requestBody) {
    box.append(el("h4", {}, "Request body"));
    for (const entry of Object.values(op.requestBody.content || {})) {
      if (entry.schema) { box.append(schemaBlock(spec, entry.schema)); break; }
    }
    box.append(examplesBlock(op.requestBody.content));
  }
  box.append(el("h4", {}, "Responses"));
  for (const [status, resp] of Object.entries(op.responses || {})) {
    box.append(el("p", {}, el("span", {class: "status"}, status), " ", resp.description || ""));
    box.append(examplesBlock(resp.content));
  }
  return box;
}

async function main() {
  const spec = await (await fetch("/openapi.json")).json();
  document.getElementById("title").textContent = spec.info.title + " " + spec.info.version;
  document.getElementById("intro").textContent = spec.info.description || "";
  const byTag = new Map();
  for (const [path, item] of Object.entries(spec.paths)) {
    for (const method of METHODS) {
      if (!item[method]) continue;
      const tag = (item[method].tags || ["other"])[0];
      if (!byTag.has(tag)) byTag.set(tag, []);
      byTag.get(tag).push([path, method, item[method]]);
    }
  }
  const ops = document.getElementById("ops");
  const toc = document.getElementById("toc");
  ops.replaceChildren();
  for (const [tag, list] of byTag) {
    ops.append(el("h2", {id: "tag-" + tag}, tag));
    toc.append(el("a", {href: "#tag-" + tag}, tag));
    for (const [path, method, op] of list) ops.append(operation(spec, path, method, op));
  }
}

main().catch((err) => {
  document.getElementById("ops").textContent = "Could not load /openapi.json: " + err;
});
"""

_HEADERS = {"Content-Security-Policy": CSP, "Cache-Control": "no-cache"}


@router.get("/docs")
async def docs_page() -> HTMLResponse:
    return HTMLResponse(_PAGE, headers=_HEADERS)


@router.get("/docs/docs.js")
async def docs_script() -> Response:
    return Response(_SCRIPT, media_type="text/javascript; charset=utf-8", headers=_HEADERS)


@router.get("/docs/docs.css")
async def docs_style() -> Response:
    return Response(_STYLE, media_type="text/css; charset=utf-8", headers=_HEADERS)
