// The document browser (with a CQL2 filter box) and one document with its chunks and offsets.

import { ApiError, get, part } from "./api.js";
import { definitionList, go, h, link, number, panel, svg } from "./dom.js";
import { explainLink } from "./explain.js";
import { errorLine } from "./notices.js";

const PAGE = 50;

export async function browse(name, query) {
  const filter = query.get("filter") || "";
  const after = query.get("after") || "";
  const input = h("textarea", {
    id: "filter-input",
    name: "filter",
    rows: 2,
    spellcheck: "false",
    placeholder: "CQL2 text, e.g. model_year >= 2023 AND doc_type = 'manual'",
    value: filter,
  });
  const form = h(
    "form",
    {
      class: "filter-form",
      id: "filter-form",
      onsubmit: (event) => {
        event.preventDefault();
        go(`/collections/${part(name)}/documents`, { filter: input.value.trim() });
      },
    },
    h("label", { for: "filter-input" }, "Filter"),
    input,
    h("div", { class: "row" }, h("button", { type: "submit" }, "Apply"), link(`/collections/${part(name)}/documents`, null, "Clear")),
  );
  const head = panel(
    null,
    h("h2", null, link(`/collections/${part(name)}`, null, name), " · documents"),
    form,
  );
  const params = new URLSearchParams({ limit: String(PAGE) });
  if (filter) params.set("filter", filter);
  if (after) params.set("after", after);
  let listing;
  try {
    listing = await get(`/v1/collections/${part(name)}/documents?${params}`);
  } catch (error) {
    if (!(error instanceof ApiError) || !error.code.startsWith("filter_")) throw error;
    head.append(filterError(error, filter, input));
    return head;
  }
  head.append(documentTable(name, listing, filter, after));
  return head;
}

/** A filter error, with the filter text repeated and the character at fault marked. */
export function filterError(error, text, input) {
  const details = error.details || {};
  const box = h("div", { class: "filter-error notice bad", dataset: { code: error.code }, role: "alert" });
  box.append(h("p", { class: "error-message" }, error.message));
  if (typeof details.position === "number") {
    const position = Math.max(0, Math.min(details.position, text.length));
    const at = text.slice(position, position + 1);
    box.dataset.position = String(position);
    box.append(
      h(
        "pre",
        { class: "filter-echo" },
        h("span", null, text.slice(0, position)),
        h("mark", { class: "at-position", title: `character ${position + 1}` }, at || "⟂"),
        h("span", null, text.slice(position + 1)),
      ),
      h("p", { class: "hint" }, at ? `At character ${position + 1}.` : "At the end of the filter."),
    );
    if (input) {
      // Once the view is on the page: a detached field cannot take the focus.
      setTimeout(() => {
        input.focus();
        input.setSelectionRange(position, Math.min(position + 1, text.length));
      }, 0);
    }
  }
  if (Array.isArray(details.known)) {
    box.append(h("p", { class: "hint" }, "Attributes this collection has: ", details.known.join(", ")));
  }
  return box;
}

function documentTable(name, listing, filter, after) {
  const rows = listing.documents.map((document) =>
    h(
      "tr",
      { dataset: { document: document.id } },
      h("td", { class: "mono" }, link(`/collections/${part(name)}/documents/${part(document.id)}`, null, document.id)),
      h("td", null, document.title),
      h("td", { class: "attributes" }, attributeChips(document.attributes)),
      h("td", null, document.access.length ? document.access.join(", ") : "everyone"),
      h("td", { class: "mono small" }, document.updated_at.slice(0, 19).replace("T", " ")),
      h("td", null, explainLink({ collection: name, document_id: document.id }, "why not?")),
    ),
  );
  const summary = h(
    "p",
    { class: "summary", id: "document-total" },
    `${number(listing.total)} document${listing.total === 1 ? "" : "s"}${filter ? " match the filter" : ""}`,
    after ? `, from after ${after}` : "",
    ".",
  );
  const more = listing.next_after
    ? link(`/collections/${part(name)}/documents`, { filter, after: listing.next_after }, "Next page")
    : null;
  return h(
    "div",
    null,
    summary,
    rows.length
      ? h(
          "table",
          { class: "grid documents" },
          h("thead", null, h("tr", null, ["id", "title", "attributes", "visible to", "updated", ""].map((t) => h("th", null, t)))),
          h("tbody", null, rows),
        )
      : h("p", { class: "empty" }, "Nothing to show."),
    h("p", { class: "actions" }, more),
  );
}

export function attributeChips(attributes) {
  return Object.entries(attributes || {}).map(([name, value]) =>
    h("span", { class: "chip" }, h("span", { class: "chip-name" }, name), " ", Array.isArray(value) ? value.join(", ") : String(value)),
  );
}

export async function show(name, id) {
  let document;
  try {
    document = await get(`/v1/collections/${part(name)}/documents/${part(id)}`);
  } catch (error) {
    if (error instanceof ApiError && error.status === 404) {
      return panel(`${name} · ${id}`, errorLine(error), explainLink({ collection: name, document_id: id }, "Ask why it is missing"));
    }
    throw error;
  }
  const chunks = document.chunks;
  return h(
    "div",
    { class: "stack", dataset: { document: document.id } },
    panel(
      null,
      h("h2", null, link(`/collections/${part(name)}/documents`, null, name), " · ", document.title || document.id),
      definitionList([
        ["id", h("span", { class: "mono" }, document.id)],
        ["media type", document.media_type],
        ["source", document.source_url],
        ["visible to", document.access.length ? document.access.join(", ") : "everyone who may read the collection"],
        ["updated", document.updated_at],
        ["text", `${number(document.text.length)} characters in ${chunks.length} chunks`],
      ]),
      h("div", { class: "attributes" }, attributeChips(document.attributes)),
      h("p", { class: "actions" }, explainLink({ collection: name, document_id: document.id }, "Why not this document?")),
    ),
    panel("Where the chunks lie", offsetStrip(document.text.length, chunks), h("p", { class: "hint" }, "Each bar is one chunk's characters in the normalized text; alternate rows show the overlap.")),
    panel(
      "Chunks",
      h(
        "ol",
        { class: "chunks" },
        chunks.map((chunk) =>
          h(
            "li",
            { class: "chunk", id: `chunk-${chunk.ordinal}`, dataset: { chunk: chunk.chunk_id } },
            h(
              "div",
              { class: "chunk-head" },
              h("span", { class: "mono" }, chunk.chunk_id),
              h("span", { class: "offsets mono" }, `chars ${chunk.char_start}–${chunk.char_end}`),
              h("span", null, `${chunk.tokens} tokens`),
              chunk.section ? h("span", { class: "section" }, chunk.section) : null,
              explainLink({ collection: name, chunk_id: chunk.chunk_id }, "why not?", "explain-chunk"),
            ),
            h("p", { class: "chunk-text" }, chunk.text),
          ),
        ),
      ),
    ),
  );
}

function offsetStrip(length, chunks) {
  const width = 1000;
  const lane = 14;
  const height = lane * 2 + 6;
  const scale = (value) => (length ? (value / length) * width : 0);
  return svg(
    "svg",
    { class: "offset-strip", viewBox: `0 0 ${width} ${height}`, preserveAspectRatio: "none", role: "img", "aria-label": "chunk offsets" },
    svg("rect", { x: 0, y: 0, width, height, class: "strip-ground" }),
    chunks.map((chunk) => {
      const anchor = svg(
        "a",
        { href: `#chunk-${chunk.ordinal}` },
        svg(
          "rect",
          {
            x: scale(chunk.char_start).toFixed(1),
            y: 3 + (chunk.ordinal % 2) * lane,
            width: Math.max(1, scale(chunk.char_end - chunk.char_start)).toFixed(1),
            height: lane - 2,
            class: `strip-chunk lane-${chunk.ordinal % 2}`,
          },
          svg("title", null, `${chunk.chunk_id}: chars ${chunk.char_start}–${chunk.char_end}`),
        ),
      );
      anchor.addEventListener("click", (event) => {
        event.preventDefault();
        window.document.getElementById(`chunk-${chunk.ordinal}`)?.scrollIntoView({ block: "center" });
      });
      return anchor;
    }),
  );
}
