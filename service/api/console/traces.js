// Traces: the list of recent requests, and one trace drawn as stage times, a candidate funnel
// and the packer's decisions.

import { ApiError, get, part, routeMissing } from "./api.js";
import { definitionList, go, h, json, link, milliseconds, number, panel, svg } from "./dom.js";
import { explainLink } from "./explain.js";
import { errorLine, notAvailable } from "./notices.js";

const LIST_FILTERS = ["collection", "route", "since", "until", "limit", "cursor"];

export async function list(query) {
  const lookup = h(
    "form",
    {
      class: "row trace-lookup",
      id: "trace-lookup",
      onsubmit: (event) => {
        event.preventDefault();
        const id = new FormData(event.target).get("trace_id").trim();
        if (id) go(`/traces/${part(id)}`);
      },
    },
    h("label", { for: "trace-id-input" }, "Open a trace by id"),
    h("input", { id: "trace-id-input", name: "trace_id", class: "mono wide", placeholder: "trace id from a response" }),
    h("button", { type: "submit" }, "Open"),
  );
  const field = (name, placeholder) => h("input", { name, id: `traces-${name}`, placeholder, value: query.get(name) || "" });
  const filters = h(
    "form",
    {
      class: "row trace-filters",
      id: "trace-filters",
      onsubmit: (event) => {
        event.preventDefault();
        const data = new FormData(event.target);
        go("/traces", Object.fromEntries([...data].filter(([, value]) => value !== "")));
      },
    },
    field("collection", "collection"),
    h("select", { name: "route", id: "traces-route" }, ["", "search", "context", "answer"].map((route) => h("option", { value: route, selected: (query.get("route") || "") === route }, route || "any route"))),
    field("since", "since (ISO 8601)"),
    field("until", "until (ISO 8601)"),
    h("button", { type: "submit" }, "List"),
  );
  const page = panel("Traces", lookup, filters);
  const params = new URLSearchParams();
  for (const name of LIST_FILTERS) if (query.get(name)) params.set(name, query.get(name));
  if (!params.has("limit")) params.set("limit", "25");
  let listing;
  try {
    listing = await get(`/v1/traces?${params}`);
  } catch (error) {
    if (routeMissing(error) || (error instanceof ApiError && error.code === "trace_not_found")) {
      page.append(notAvailable("The trace list"));
      return page;
    }
    if (!(error instanceof ApiError) || error.status === 401) throw error;
    page.append(errorLine(error));
    return page;
  }
  page.append(traceTable(listing.traces));
  if (listing.next_cursor) {
    const next = Object.fromEntries([...params].filter(([name]) => name !== "cursor"));
    page.append(h("p", { class: "actions" }, link("/traces", { ...next, cursor: listing.next_cursor }, "Older traces")));
  }
  return page;
}

function traceTable(traces) {
  if (!traces.length) return h("p", { class: "empty" }, "No trace matches.");
  return h(
    "table",
    { class: "grid traces", id: "trace-table" },
    h("thead", null, h("tr", null, ["when", "route", "collection", "query", "candidates", "hits", "outcome", "time"].map((title) => h("th", null, title)))),
    h(
      "tbody",
      null,
      traces.map((trace) => {
        const id = trace.trace_id;
        return h(
          "tr",
          { dataset: { trace: id } },
          h("td", { class: "mono small" }, link(`/traces/${part(id)}`, null, String(trace.created_at).slice(0, 19).replace("T", " "))),
          h("td", null, trace.route),
          h("td", null, trace.collection),
          h("td", { class: "query-cell" }, trace.query ?? ""),
          h("td", { class: "number" }, number(trace.candidates)),
          h("td", { class: "number" }, number(trace.hits)),
          h("td", null, outcomeOf(trace)),
          h("td", { class: "number" }, milliseconds(trace.milliseconds)),
        );
      }),
    ),
  );
}

function outcomeOf(trace) {
  const outcome = trace.outcome || "";
  return h("span", { class: `badge outcome-${outcome}` }, trace.reason ? `${outcome}: ${trace.reason}` : outcome);
}

export async function show(id) {
  let trace;
  try {
    trace = await get(`/v1/traces/${part(id)}`);
  } catch (error) {
    if (error instanceof ApiError && error.status === 404) return panel("Trace", errorLine(error));
    throw error;
  }
  const stages = trace.stages || [];
  const request = trace.request || {};
  const byName = Object.fromEntries(stages.map((stage) => [stage.stage, stage]));
  const explainBase = {
    collection: trace.collection,
    route: trace.route === "search" ? "" : trace.route,
    query: request.query,
    filter: typeof request.filter === "string" ? request.filter : "",
    mode: request.mode && request.mode !== "hybrid" ? request.mode : "",
    top_k: request.top_k,
    depth: request.depth,
    token_budget: request.token_budget,
    window_attribute: request.time_window ? request.time_window.attribute : "",
    window_last: request.time_window ? request.time_window.last : "",
  };
  const chunkLink = (chunkId) => explainLink({ ...explainBase, chunk_id: chunkId }, chunkId, "mono explain-link");
  return h(
    "div",
    { class: "stack trace-view", dataset: { trace: trace.trace_id } },
    panel(
      null,
      h("h2", null, `Trace: ${trace.route}`, h("span", { class: "mono small subtle" }, ` ${trace.trace_id}`)),
      definitionList([
        ["collection", link(`/collections/${part(trace.collection)}`, null, trace.collection)],
        ["when", trace.created_at],
        ["query", request.query],
        ["filter", request.filter ? (typeof request.filter === "string" ? request.filter : JSON.stringify(request.filter)) : null],
        ["time window", request.time_window ? `${request.time_window.attribute}, last ${request.time_window.last}` : null],
        ["mode", request.mode],
        ["top_k · depth", request.top_k !== undefined ? `${request.top_k} · ${request.depth_used ?? request.depth}` : null],
        ["token budget", request.token_budget],
        ["outcome", traceOutcome(trace)],
        ["total", milliseconds(trace.total_milliseconds)],
      ]),
    ),
    panel("Stages", stageChart(stages), filterNotes(byName.filter)),
    panel("Candidate funnel", funnelChart(funnelSteps(trace, byName)), h("p", { class: "hint" }, "Bar lengths use a logarithmic scale so that small counts stay visible; the numbers are exact.")),
    byName.packing ? panel("Packing decisions", packingTable(byName.packing, trace, chunkLink)) : null,
    byName.generation ? panel("Generation", generationFacts(byName.generation)) : null,
    panel("Top of each ranking", stages.filter((stage) => Array.isArray(stage.top) && stage.top.length).map((stage) => topEntries(stage, chunkLink))),
    h("details", { class: "panel" }, h("summary", null, "The trace as JSON"), json(trace)),
  );
}

function traceOutcome(trace) {
  if (trace.reason) return `declined: ${trace.reason}`;
  if (trace.generator_error) return `generator failed: ${trace.generator_error}`;
  if (trace.error) return `failed: ${trace.error.message || trace.error.code}`;
  if (Array.isArray(trace.markers)) return `answered, citing ${trace.markers.map((m) => `[${m}]`).join(" ")}`;
  if (Array.isArray(trace.hits)) return `${trace.hits.length} hits`;
  if (trace.tokens_used !== undefined) return `${trace.tokens_used} tokens of context`;
  return null;
}

export function funnelSteps(trace, byName) {
  const steps = [];
  const filter = byName.filter;
  if (filter && filter.counts) {
    if (typeof filter.counts.chunks === "number") steps.push(["all chunks", filter.counts.chunks]);
    steps.push(["visible to the key", filter.counts.rows]);
    steps.push(["pass filter and time window", filter.counts.candidates]);
  }
  for (const name of ["lexical", "semantic"]) {
    const stage = byName[name];
    if (stage && stage.counts) steps.push([`${name} ranking`, stage.counts.ranked]);
  }
  if (byName.fusion) steps.push(["fused", byName.fusion.counts.fused]);
  const packing = byName.packing;
  if (packing) {
    const packed = (packing.chunks || []).filter((chunk) => chunk.outcome === "included" || chunk.outcome === "merged");
    steps.push(["packed", packed.length]);
    if (Array.isArray(trace.markers)) {
      steps.push(["cited", packed.filter((chunk) => trace.markers.includes(chunk.marker)).length]);
    }
  } else if (Array.isArray(trace.hits)) {
    steps.push(["returned", trace.hits.length]);
  }
  return steps.filter(([, count]) => typeof count === "number");
}

function funnelChart(steps) {
  if (!steps.length) return h("p", { class: "empty" }, "This trace has no counts to draw.");
  const labelWidth = 210;
  const barSpace = 520;
  const row = 26;
  const top = Math.max(...steps.map(([, count]) => count), 1);
  const length = (count) => (count > 0 ? Math.max(2, (Math.log10(count + 1) / Math.log10(top + 1)) * barSpace) : 0);
  return svg(
    "svg",
    { class: "funnel", id: "funnel-chart", viewBox: `0 0 ${labelWidth + barSpace + 90} ${steps.length * row + 6}`, role: "img", "aria-label": "candidate funnel" },
    steps.map(([label, count], index) => {
      const y = index * row + 3;
      const width = length(count);
      return svg(
        "g",
        { class: "funnel-step", "data-step": label, "data-count": count },
        svg("text", { x: labelWidth - 10, y: y + row / 2 + 4, class: "funnel-label", "text-anchor": "end" }, label),
        svg("rect", { x: labelWidth, y, width: width.toFixed(1), height: row - 6, class: `funnel-bar bar-${index % 4}` }),
        svg("text", { x: labelWidth + width + 8, y: y + row / 2 + 4, class: "funnel-count" }, number(count)),
      );
    }),
  );
}

function stageChart(stages) {
  const timed = stages.filter((stage) => typeof stage.milliseconds === "number");
  if (!timed.length) return h("p", { class: "empty" }, "No stage was timed.");
  const labelWidth = 150;
  const barSpace = 520;
  const row = 24;
  const longest = Math.max(...timed.map((stage) => stage.milliseconds), 0.001);
  return svg(
    "svg",
    { class: "stage-chart", id: "stage-chart", viewBox: `0 0 ${labelWidth + barSpace + 90} ${timed.length * row + 6}`, role: "img", "aria-label": "stage times" },
    timed.map((stage, index) => {
      const y = index * row + 3;
      const width = Math.max(1, (stage.milliseconds / longest) * barSpace);
      return svg(
        "g",
        { class: "stage-row", "data-stage": stage.stage },
        svg("text", { x: labelWidth - 10, y: y + row / 2 + 4, class: "stage-label", "text-anchor": "end" }, stage.stage.replace(/_/g, " ")),
        svg("rect", { x: labelWidth, y, width: width.toFixed(1), height: row - 6, class: `stage-bar stage-${stage.stage}` }),
        svg("text", { x: labelWidth + width + 8, y: y + row / 2 + 4, class: "stage-time" }, milliseconds(stage.milliseconds)),
      );
    }),
  );
}

function filterNotes(filter) {
  if (!filter) return null;
  const window = filter.time_window;
  const inferredFilter = filter.inferred_filter;
  return definitionList([
    ["filter as checked", filter.filter ? h("code", null, filter.filter) : null],
    ["time window", window ? `${window.attribute} from ${window.start} to ${window.end}` : null],
    ["filter from the question", inferredFilter ? h("code", null, inferredFilter.cql2_text || "none found") : null],
  ]);
}

function packingTable(packing, trace, chunkLink) {
  const counts = packing.counts || {};
  const cited = new Set(Array.isArray(trace.markers) ? trace.markers : []);
  const chunks = packing.chunks || [];
  const turnedAway = chunks.filter((chunk) => chunk.outcome === "budget");
  const table = (id, rows) =>
    h(
      "table",
      { class: "grid packing", id },
      h("thead", null, h("tr", null, ["chunk", "outcome", "passage", "score"].map((title) => h("th", null, title)))),
      h(
        "tbody",
        null,
        rows.map((chunk) =>
          h(
            "tr",
            { class: `outcome-${chunk.outcome}`, dataset: { chunk: chunk.chunk_id } },
            h("td", null, chunkLink(chunk.chunk_id)),
            h("td", null, h("span", { class: `badge outcome-${chunk.outcome}` }, chunk.outcome)),
            h("td", null, chunk.marker ? `[${chunk.marker}]${cited.has(chunk.marker) ? " cited" : ""}` : ""),
            h("td", { class: "number" }, number(chunk.score)),
          ),
        ),
      ),
    );
  return h(
    "div",
    null,
    h("p", { class: "summary" }, `${number(counts.considered)} chunks considered, ${number(counts.passages)} passages, ${number(counts.tokens_used)} of ${number(counts.token_budget)} tokens.`),
    table("packing-table", chunks.filter((chunk) => chunk.outcome !== "budget")),
    turnedAway.length
      ? h("details", { class: "turned-away" }, h("summary", null, `${turnedAway.length} more did not fit the budget`), table("packing-budget", turnedAway))
      : null,
  );
}

function generationFacts(stage) {
  return definitionList([
    ["generator", stage.generator],
    ["evidence score", stage.evidence_score !== undefined ? number(stage.evidence_score) : null],
    ["markers used", Array.isArray(stage.markers_used) ? stage.markers_used.map((m) => `[${m}]`).join(" ") || "none" : null],
    ["declined", stage.declined === undefined ? null : stage.declined ? "yes" : "no"],
    ["error", stage.error],
    ["notes", Array.isArray(stage.notes) && stage.notes.length ? stage.notes.join("; ") : null],
  ]);
}

function topEntries(stage, chunkLink) {
  return h(
    "details",
    { class: "top-entries" },
    h("summary", null, `${stage.stage}: ${Object.entries(stage.counts || {}).map(([name, value]) => `${name} ${number(value)}`).join(", ")}`),
    h(
      "table",
      { class: "grid" },
      h("thead", null, h("tr", null, ["rank", "chunk", "score", "lexical", "semantic"].map((title) => h("th", null, title)))),
      h(
        "tbody",
        null,
        stage.top.map((entry) =>
          h(
            "tr",
            null,
            h("td", { class: "number" }, entry.rank),
            h("td", null, chunkLink(entry.chunk_id)),
            h("td", { class: "number" }, number(entry.score)),
            h("td", { class: "number" }, entry.ranks ? entry.ranks.lexical ?? "–" : ""),
            h("td", { class: "number" }, entry.ranks ? entry.ranks.semantic ?? "–" : ""),
          ),
        ),
      ),
    ),
  );
}
