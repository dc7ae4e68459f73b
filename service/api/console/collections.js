// Collections: what each holds (counts, tokenizer, embedder) and its attribute schema.

import { get, part } from "./api.js";
import { definitionList, h, link, number, panel } from "./dom.js";
import { caution } from "./notices.js";

export async function list() {
  const { collections } = await get("/v1/collections");
  if (!collections.length) {
    return panel("Collections", h("p", { class: "empty" }, "No collection is visible to this key."));
  }
  return panel(
    "Collections",
    h(
      "div",
      { class: "cards" },
      collections.map((collection) =>
        h(
          "article",
          { class: "card collection-card", dataset: { collection: collection.name } },
          h("h3", null, link(`/collections/${part(collection.name)}`, null, collection.name)),
          h("p", { class: "description" }, collection.description || "No description."),
          h(
            "div",
            { class: "tallies" },
            tally(collection.documents, "documents"),
            tally(collection.chunks, "chunks"),
            tally(Object.keys(collection.attributes).length, "attributes"),
          ),
          definitionList([
            ["tokenizer", collection.tokenizer],
            ["embedder", collection.embedder],
          ]),
          h(
            "p",
            { class: "actions" },
            link(`/collections/${part(collection.name)}/documents`, null, "Documents"),
            link("/bench", { collection: collection.name }, "Query bench"),
            link("/traces", { collection: collection.name }, "Traces"),
          ),
        ),
      ),
    ),
  );
}

function tally(count, label) {
  return h("span", { class: "tally" }, h("b", null, number(count)), ` ${label}`);
}

export async function detail(name) {
  const collection = await get(`/v1/collections/${part(name)}`);
  const attributes = Object.entries(collection.attributes);
  const rebuild = collection.rebuild;
  return h(
    "div",
    { class: "stack", dataset: { collection: collection.name } },
    panel(
      collection.name,
      h("p", { class: "description" }, collection.description || "No description."),
      h(
        "div",
        { class: "tallies" },
        tally(collection.documents, "documents"),
        tally(collection.chunks, "chunks"),
      ),
      definitionList([
        ["tokenizer", collection.tokenizer],
        ["embedder", collection.embedder],
        [
          "chunking",
          `${collection.chunking.max_tokens} tokens, ${collection.chunking.overlap_tokens} overlapping`,
        ],
        ["retrieval", retrievalSummary(collection.retrieval)],
        ["cited attributes", collection.cite_attributes.join(", ") || "none"],
        ["revision", String(collection.revision)],
        ["updated", collection.updated_at],
        ["rebuilding", rebuild ? `${rebuild.done} of ${rebuild.total} documents` : null],
      ]),
      caution(collection.answer_caution),
      h(
        "p",
        { class: "actions" },
        link(`/collections/${part(name)}/documents`, null, "Browse documents"),
        link("/bench", { collection: name }, "Query bench"),
        link("/traces", { collection: name }, "Traces"),
      ),
    ),
    panel(
      "Schema",
      attributes.length
        ? h(
            "table",
            { class: "grid schema" },
            h("thead", null, h("tr", null, h("th", null, "attribute"), h("th", null, "type"), h("th", null, "description"), h("th", null, "inference"))),
            h(
              "tbody",
              null,
              attributes.map(([attribute, spec]) =>
                h(
                  "tr",
                  null,
                  h("td", { class: "mono" }, attribute),
                  h("td", { class: "mono" }, spec.type),
                  h("td", null, spec.description || ""),
                  h("td", null, inferenceNote(spec)),
                ),
              ),
            ),
          )
        : h("p", { class: "empty" }, "No attributes declared."),
    ),
  );
}

function retrievalSummary(retrieval) {
  return Object.entries(retrieval || {})
    .map(([name, value]) => `${name} ${value}`)
    .join(" · ");
}

function inferenceNote(spec) {
  if (spec.infer === false) return "left out";
  const aliases = spec.aliases ? Object.keys(spec.aliases).length : 0;
  const phrases = spec.phrases ? spec.phrases.true.length + spec.phrases.false.length : 0;
  const parts = [];
  if (aliases) parts.push(`${aliases} values with aliases`);
  if (phrases) parts.push(`${phrases} phrases`);
  return parts.join(", ");
}
