// The query bench: search, context and answer side by side, in each ranking mode, for one query.

import { ApiError, collectionNames, get, part, post } from "./api.js";
import { go, goTo, h, link, milliseconds, number, panel } from "./dom.js";
import { explainLink } from "./explain.js";
import { caution, errorLine } from "./notices.js";

const ROUTES = ["search", "context", "answer"];
const MODES = ["hybrid", "lexical", "semantic"];

export async function view(query) {
  const names = await collectionNames();
  const chosen = query.get("collection") || names[0] || "";
  const schema = chosen ? await get(`/v1/collections/${part(chosen)}`) : null;
  const timed = schema ? Object.entries(schema.attributes).filter(([, spec]) => spec.type === "date" || spec.type === "datetime").map(([name]) => name) : [];
  const routes = query.getAll("route").length ? query.getAll("route") : ROUTES;
  const modes = query.getAll("mode").length ? query.getAll("mode") : MODES;
  const input = (name, props) => h("input", { name, id: `bench-${name}`, value: query.get(name) || "", ...props });
  const form = h(
    "form",
    { class: "bench-form form-grid", id: "bench-form", onsubmit: submit },
    h("label", { for: "bench-collection" }, "Collection"),
    h("select", { name: "collection", id: "bench-collection", onchange: (event) => go("/bench", { collection: event.target.value }) }, names.map((name) => h("option", { value: name, selected: name === chosen }, name))),
    h("label", { for: "bench-query" }, "Query"),
    input("query", { required: true, placeholder: "ask what a user would ask", class: "wide" }),
    h("label", { for: "bench-filter" }, "Filter"),
    input("filter", { class: "mono wide", placeholder: "CQL2 text (optional)" }),
    h("label", { for: "bench-window_attribute" }, "Time window"),
    h(
      "div",
      { class: "row" },
      h("select", { name: "window_attribute", id: "bench-window_attribute" }, h("option", { value: "" }, "none"), timed.map((name) => h("option", { value: name, selected: query.get("window_attribute") === name }, name))),
      input("window_last", { placeholder: "last, e.g. P2Y or P90D" }),
      input("window_now", { placeholder: "now (ISO 8601, optional)" }),
    ),
    h("label", { for: "bench-infer_filter" }, "Filter from the question"),
    h("select", { name: "infer_filter", id: "bench-infer_filter" }, ["off", "suggest", "apply"].map((mode) => h("option", { value: mode, selected: (query.get("infer_filter") || "off") === mode }, mode))),
    h("label", { for: "bench-top_k" }, "top_k · token budget"),
    h("div", { class: "row" }, input("top_k", { type: "number", min: 1, placeholder: "10" }), input("token_budget", { type: "number", min: 1, placeholder: "1000" })),
    h("span", null, "Run"),
    h(
      "div",
      { class: "row checks" },
      ROUTES.map((route) => h("label", null, h("input", { type: "checkbox", name: "route", value: route, checked: routes.includes(route) }), ` ${route}`)),
      h("span", { class: "divider" }),
      MODES.map((mode) => h("label", null, h("input", { type: "checkbox", name: "mode", value: mode, checked: modes.includes(mode) }), ` ${mode}`)),
    ),
    h("span"),
    h("div", { class: "row" }, h("button", { type: "submit", id: "bench-run" }, "Run side by side")),
  );
  const page = h("div", { class: "stack" }, panel("Query bench", form));
  if (chosen && query.get("query")) page.append(await grid(chosen, query, routes, modes));
  return page;
}

function submit(event) {
  event.preventDefault();
  const data = new FormData(event.target);
  const params = new URLSearchParams();
  for (const [name, value] of data) if (value !== "" && !(name === "infer_filter" && value === "off")) params.append(name, value);
  goTo(`#/bench?${params}`);
}

function requestBody(query, route, mode) {
  const body = { query: query.get("query"), mode };
  if (query.get("filter")) body.filter = query.get("filter");
  if (query.get("top_k")) body.top_k = Number(query.get("top_k"));
  if (query.get("infer_filter")) body.infer_filter = query.get("infer_filter");
  if (query.get("window_attribute") && query.get("window_last")) {
    body.time_window = { attribute: query.get("window_attribute"), last: query.get("window_last") };
    if (query.get("window_now")) body.time_window.now = query.get("window_now");
  }
  if (route !== "search" && query.get("token_budget")) body.token_budget = Number(query.get("token_budget"));
  return body;
}

async function grid(collection, query, routes, modes) {
  const cells = [];
  for (const route of routes) {
    for (const mode of modes) cells.push(runCell(collection, query, route, mode));
  }
  const finished = await Promise.all(cells);
  return h(
    "section",
    { class: `bench-grid columns-${modes.length}`, id: "bench-results" },
    modes.map((mode) => h("h3", { class: "column-head" }, mode)),
    finished,
  );
}

async function runCell(collection, query, route, mode) {
  const body = requestBody(query, route, mode);
  const started = performance.now();
  let content;
  let traceId = null;
  try {
    const answer = await post(`/v1/collections/${part(collection)}/${route}`, body);
    traceId = answer.trace_id;
    const render = { search: searchCell, context: contextCell, answer: answerCell }[route];
    content = render(collection, answer, query, mode);
  } catch (error) {
    if (!(error instanceof ApiError)) throw error;
    content = errorLine(error);
    traceId = error.details.trace_id || null;
  }
  const elapsed = performance.now() - started;
  return h(
    "article",
    { class: `card bench-cell route-${route}`, dataset: { route, mode } },
    h(
      "header",
      { class: "cell-head" },
      h("span", { class: "route-name" }, route),
      h("span", { class: "mode-name" }, mode),
      h("span", { class: "elapsed" }, milliseconds(elapsed)),
      traceId ? link(`/traces/${part(traceId)}`, null, h("span", { class: "trace-link" }, "trace")) : null,
    ),
    content,
  );
}

function explainParams(collection, query, route, mode) {
  return {
    collection,
    route: route === "search" ? "" : route,
    query: query.get("query"),
    filter: query.get("filter"),
    mode: mode === "hybrid" ? "" : mode,
    top_k: query.get("top_k"),
    token_budget: query.get("token_budget"),
    infer_filter: query.get("infer_filter"),
    window_attribute: query.get("window_attribute"),
    window_last: query.get("window_last"),
  };
}

function inferred(answer) {
  const found = answer.inferred_filter;
  if (!found) return null;
  return h("p", { class: "inferred" }, "Filter from the question: ", h("code", null, found.cql2_text || "none"), found.dropped.length ? ` (${found.dropped.length} clause${found.dropped.length === 1 ? "" : "s"} dropped)` : "");
}

function searchCell(collection, answer, query, mode) {
  return h(
    "div",
    null,
    inferred(answer),
    h("p", { class: "summary" }, `${number(answer.candidates)} candidates, ${answer.hits.length} hits`),
    h(
      "ol",
      { class: "hits" },
      answer.hits.map((hit) =>
        h(
          "li",
          { class: "hit", dataset: { chunk: hit.chunk_id } },
          h("div", { class: "hit-title" }, link(`/collections/${part(collection)}/documents/${part(hit.document_id)}`, null, hit.title || hit.document_id)),
          h("div", { class: "hit-meta" }, h("span", { class: "mono" }, hit.chunk_id), h("span", null, `score ${number(hit.score)}`), h("span", null, `L ${hit.ranks.lexical ?? "–"} · S ${hit.ranks.semantic ?? "–"}`)),
          h("p", { class: "snippet" }, snippet(hit.text)),
          explainLink({ ...explainParams(collection, query, "search", mode), chunk_id: hit.chunk_id }, "why this rank?"),
        ),
      ),
    ),
  );
}

function passages(collection, list, query, route, mode) {
  return h(
    "ol",
    { class: "passages" },
    list.map((passage) =>
      h(
        "li",
        { class: "passage", dataset: { marker: String(passage.marker) } },
        h("div", { class: "hit-title" }, `[${passage.marker}] `, link(`/collections/${part(collection)}/documents/${part(passage.document_id)}`, null, passage.title || passage.document_id), passage.section ? h("span", { class: "section" }, ` — ${passage.section}`) : null),
        h("div", { class: "hit-meta" }, h("span", null, `${passage.tokens} tokens`), h("span", { class: "mono" }, `chars ${passage.char_start}–${passage.char_end}`)),
        h("p", { class: "snippet" }, snippet(passage.text)),
        h("div", { class: "chunk-ids" }, passage.chunk_ids.map((id) => explainLink({ ...explainParams(collection, query, route, mode), chunk_id: id }, id, "mono explain-link"))),
      ),
    ),
  );
}

function contextCell(collection, answer, query, mode) {
  return h(
    "div",
    null,
    inferred(answer),
    h("p", { class: "summary" }, `${answer.passages.length} passages, ${number(answer.tokens_used)} of ${number(answer.token_budget)} tokens`),
    passages(collection, answer.passages, query, "context", mode),
  );
}

function answerCell(collection, answer, query, mode) {
  const declined = answer.answer === null;
  return h(
    "div",
    null,
    inferred(answer),
    declined
      ? h("p", { class: "declined" }, `No answer: ${answer.reason === "no_candidates" ? "no chunk passed the filter" : "the passages do not support one"}.`)
      : h("p", { class: "answer-text" }, answer.answer),
    answer.citations.length
      ? h(
          "ul",
          { class: "citations" },
          answer.citations.map((citation) =>
            h("li", null, `[${citation.marker}] `, link(`/collections/${part(collection)}/documents/${part(citation.document_id)}`, null, citation.title || citation.document_id), citation.section ? ` — ${citation.section}` : ""),
          ),
        )
      : null,
    caution(answer.caution),
    h("details", null, h("summary", null, `${answer.passages.length} passages given to ${answer.generator}`), passages(collection, answer.passages, query, "answer", mode)),
  );
}

function snippet(text) {
  return text.length > 180 ? `${text.slice(0, 180)}…` : text;
}
