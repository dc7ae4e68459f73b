// "Why not this document?": the explain route, one click away from any chunk or document.

import { ApiError, collectionNames, part, post, routeMissing } from "./api.js";
import { definitionList, go, h, hashFor, json, number, panel } from "./dom.js";
import { errorLine, notAvailable } from "./notices.js";

// The request fields the explain form carries over from wherever it was opened.
const REQUEST_FIELDS = ["route", "query", "filter", "mode", "top_k", "depth", "token_budget", "infer_filter", "window_attribute", "window_last"];

export function explainLink(params, label, className) {
  return h("a", { href: hashFor("/explain", params), class: className || "explain-link" }, label);
}

export async function view(query) {
  const names = await collectionNames();
  const chosen = query.get("collection") || names[0] || "";
  const target = query.get("chunk_id") ? "chunk_id" : "document_id";
  const field = (name, props) => h("input", { name, id: `explain-${name}`, value: query.get(name) || "", ...props });
  const form = h(
    "form",
    { class: "explain-form form-grid", id: "explain-form", onsubmit: submit },
    h("label", { for: "explain-collection" }, "Collection"),
    h("select", { name: "collection", id: "explain-collection" }, names.map((name) => h("option", { value: name, selected: name === chosen }, name))),
    h("label", { for: "explain-target-id" }, "Which"),
    h(
      "div",
      { class: "row" },
      h("select", { name: "target", id: "explain-target" }, h("option", { value: "document_id", selected: target === "document_id" }, "document id"), h("option", { value: "chunk_id", selected: target === "chunk_id" }, "chunk id")),
      h("input", { name: "target_id", id: "explain-target-id", class: "mono", required: true, value: query.get(target) || "" }),
    ),
    h("label", { for: "explain-route" }, "As a"),
    h("select", { name: "route", id: "explain-route" }, ["search", "context", "answer"].map((route) => h("option", { value: route, selected: (query.get("route") || "search") === route }, route))),
    h("label", { for: "explain-query" }, "Query"),
    field("query", { required: true, placeholder: "the question whose results left it out" }),
    h("label", { for: "explain-filter" }, "Filter"),
    field("filter", { class: "mono", placeholder: "CQL2 text (optional)" }),
    h("label", { for: "explain-window_attribute" }, "Time window"),
    h("div", { class: "row" }, field("window_attribute", { placeholder: "date attribute" }), field("window_last", { placeholder: "e.g. P2Y" })),
    h("label", { for: "explain-mode" }, "Mode"),
    h("select", { name: "mode", id: "explain-mode" }, ["hybrid", "lexical", "semantic"].map((mode) => h("option", { value: mode, selected: (query.get("mode") || "hybrid") === mode }, mode))),
    h("label", { for: "explain-top_k" }, "top_k · depth"),
    h("div", { class: "row" }, field("top_k", { type: "number", min: 1, placeholder: "10" }), field("depth", { type: "number", min: 1, placeholder: "100" })),
    h("label", { for: "explain-token_budget" }, "Token budget"),
    field("token_budget", { type: "number", min: 1, placeholder: "leave empty to stop at the ranking" }),
    h("label", { for: "explain-infer_filter" }, "Filter from the question"),
    h("select", { name: "infer_filter", id: "explain-infer_filter" }, ["off", "suggest", "apply"].map((mode) => h("option", { value: mode, selected: (query.get("infer_filter") || "off") === mode }, mode))),
    h("label", { for: "explain-as_key" }, "As key (admins)"),
    field("as_key", { placeholder: "name of another key, to see what it sees (optional)" }),
    h("span"),
    h("div", { class: "row" }, h("button", { type: "submit" }, "Explain")),
  );
  const hint = h("p", { class: "hint" }, "Runs the request again and says, for each chunk of the document, the first stage that left it out and why.");
  const targetId = query.get(target);
  if (chosen && targetId && query.get("query") && query.get("run") === "1") {
    // The finding first; the request stays below, to change and run again.
    const found = await result(chosen, explainBody(query, target, targetId));
    return panel("Why not this document?", found, h("details", { class: "again", open: found.id !== "explain-result" }, h("summary", null, "Change the request"), form));
  }
  return panel("Why not this document?", hint, form);
}

function submit(event) {
  event.preventDefault();
  const data = new FormData(event.target);
  const params = { collection: data.get("collection"), [data.get("target")]: data.get("target_id"), run: "1" };
  for (const name of [...REQUEST_FIELDS, "as_key"]) params[name] = data.get(name);
  if (params.infer_filter === "off") params.infer_filter = "";
  if (params.route === "search") params.route = "";
  if (params.mode === "hybrid") params.mode = "";
  go("/explain", params);
}

export function explainBody(query, target, targetId) {
  const body = { query: query.get("query"), [target]: targetId };
  if (query.get("route")) body.route = query.get("route");
  if (query.get("as_key")) body.as_key = query.get("as_key");
  if (query.get("filter")) body.filter = query.get("filter");
  if (query.get("mode")) body.mode = query.get("mode");
  for (const name of ["top_k", "depth", "token_budget"]) {
    if (query.get(name)) body[name] = Number(query.get(name));
  }
  if (query.get("infer_filter")) body.infer_filter = query.get("infer_filter");
  if (query.get("window_attribute") && query.get("window_last")) {
    body.time_window = { attribute: query.get("window_attribute"), last: query.get("window_last") };
  }
  return body;
}

async function result(collection, body) {
  let answer;
  try {
    answer = await post(`/v1/collections/${part(collection)}/explain`, body);
  } catch (error) {
    if (routeMissing(error)) return notAvailable("Explain");
    if (error instanceof ApiError && error.status !== 401) return h("div", { class: "explain-result" }, errorLine(error));
    throw error;
  }
  return renderExplanation(collection, answer);
}

function renderExplanation(collection, answer) {
  const budget = answer.token_budget === null ? "" : `, token budget ${answer.token_budget}`;
  return h(
    "div",
    { class: "explain-result", id: "explain-result" },
    h(
      "p",
      { class: "summary" },
      `Followed through the ${answer.route} route in ${answer.mode} mode${answer.as_key ? `, as key ${answer.as_key} sees it` : ""}: `,
      `${answer.candidates} candidates, top_k ${answer.top_k}, depth ${answer.depth}${budget}.`,
    ),
    answer.inferred_filter ? h("p", { class: "inferred" }, "Filter from the question: ", h("code", null, answer.inferred_filter.cql2_text || "none")) : null,
    answer.cuts.length ? cutTable(collection, answer.cuts) : null,
    h("ol", { class: "verdicts" }, answer.chunks.map((chunk) => verdict(collection, answer.document_id, chunk))),
    h("details", null, h("summary", null, "Everything the server said"), json(answer)),
  );
}

function cutTable(collection, cuts) {
  return h(
    "table",
    { class: "grid cuts" },
    h("thead", null, h("tr", null, ["cut", "at", "last chunk through", "its rank", "its score"].map((title) => h("th", null, title)))),
    h(
      "tbody",
      null,
      cuts.map((cut) =>
        h(
          "tr",
          null,
          h("td", null, cut.stage.replace(/_/g, " ")),
          h("td", { class: "number" }, cut.cut_at),
          h("td", { class: "mono" }, cut.chunk_id ? chunkPage(collection, cut.chunk_id) : "none"),
          h("td", { class: "number" }, cut.rank ?? "–"),
          h("td", { class: "number" }, number(cut.score)),
        ),
      ),
    ),
  );
}

function chunkPage(collection, chunkId) {
  const documentId = chunkId.slice(0, chunkId.lastIndexOf("#"));
  const ordinal = Number(chunkId.slice(chunkId.lastIndexOf("#") + 1));
  return h("a", { href: `${hashFor(`/collections/${part(collection)}/documents/${part(documentId)}`)}` , title: `chunk ${ordinal}` }, chunkId);
}

function verdict(collection, documentId, chunk) {
  const kept = chunk.stage === null;
  const facts = [];
  if (chunk.clause) {
    const values = Object.entries(chunk.clause.values).map(([name, value]) => `${name} = ${value === null ? "absent" : JSON.stringify(value)}`);
    facts.push(["clause", h("code", null, chunk.clause.clause)], ["it is", `${chunk.clause.result} (from the ${chunk.clause.source.replace(/_/g, " ")})`], ["values", values.join(", ") || "none"]);
  }
  if (chunk.ranks) {
    facts.push(["ranks", Object.entries(chunk.ranks).map(([name, standing]) => `${name} ${standing.rank ?? "none"}${standing.score === null ? "" : ` (${number(standing.score)})`}`).join(" · ")]);
  }
  if (chunk.packing) {
    const packing = chunk.packing;
    facts.push(["packer", `${packing.outcome}${packing.marker ? ` in passage [${packing.marker}]` : ""}${packing.duplicate_of ? `, repeating ${packing.duplicate_of}` : ""}, ${packing.tokens} tokens`]);
    if (packing.passage_chunk_ids.length > 1) facts.push(["passage chunks", packing.passage_chunk_ids.join(", ")]);
  }
  if (chunk.answer) {
    const finding = chunk.answer;
    facts.push(["answer", `${finding.answered ? "given" : `declined (${finding.reason})`}; ${finding.cited ? "cites it" : "does not cite it"}`]);
    if (finding.spans && finding.spans.length) {
      facts.push(["sentences weighed", h("ul", { class: "spans" }, finding.spans.map((span) => h("li", { class: span.chosen ? "chosen" : "" }, `${number(span.score)}${span.chosen ? " chosen" : ""}: ${span.text}`)))]);
    }
  }
  return h(
    "li",
    { class: `verdict ${kept ? "kept" : "left-out"}`, dataset: { chunk: chunk.chunk_id, stage: chunk.stage || "", outcome: chunk.outcome } },
    h(
      "div",
      { class: "verdict-head" },
      chunkPage(collection, chunk.chunk_id),
      h("span", { class: "stage-badge" }, kept ? "reached the response" : `left out at ${chunk.stage.replace(/_/g, " ")}`),
      h("span", { class: "outcome mono" }, chunk.outcome.replace(/_/g, " ")),
      chunk.section ? h("span", { class: "section" }, chunk.section) : null,
    ),
    h("p", { class: "reason" }, chunk.reason),
    facts.length ? definitionList(facts) : null,
  );
}
