// The console's shell: the key form, the section rail and a hash router that renders one view.

import { keyStore } from "./api.js";
import { h } from "./dom.js";
import * as bench from "./bench.js";
import * as collections from "./collections.js";
import * as documents from "./documents.js";
import * as explain from "./explain.js";
import { errorView } from "./notices.js";
import * as traces from "./traces.js";

const decode = decodeURIComponent;

const ROUTES = [
  [/^\/?$/, () => collections.list()],
  [/^\/collections$/, () => collections.list()],
  [/^\/collections\/([^/]+)$/, (m) => collections.detail(decode(m[1]))],
  [/^\/collections\/([^/]+)\/documents$/, (m, q) => documents.browse(decode(m[1]), q)],
  [/^\/collections\/([^/]+)\/documents\/(.+)$/, (m) => documents.show(decode(m[1]), decode(m[2]))],
  [/^\/bench$/, (m, q) => bench.view(q)],
  [/^\/traces$/, (m, q) => traces.list(q)],
  [/^\/traces\/(.+)$/, (m) => traces.show(decode(m[1]))],
  [/^\/explain$/, (m, q) => explain.view(q)],
];

let rendering = 0;

async function render() {
  const ticket = ++rendering;
  const [path, queryText] = location.hash.replace(/^#/, "").split("?", 2);
  const query = new URLSearchParams(queryText || "");
  const view = document.getElementById("view");
  markSection(path);
  view.replaceChildren(h("p", { class: "loading" }, "Loading…"));
  let content;
  for (const [pattern, make] of ROUTES) {
    const match = pattern.exec(path || "/");
    if (!match) continue;
    try {
      content = await make(match, query);
    } catch (error) {
      content = errorView(error);
    }
    break;
  }
  if (ticket !== rendering) return;
  view.replaceChildren(content || errorView(new Error("No such page in the console.")));
  view.dataset.ready = path || "/";
  window.scrollTo(0, 0);
}

function markSection(path) {
  const section = (path || "/collections").split("/")[1] || "collections";
  for (const anchor of document.querySelectorAll(".rail a")) {
    anchor.classList.toggle("current", anchor.dataset.section === section);
  }
}

function showKeyStatus() {
  const status = document.getElementById("key-status");
  status.textContent = keyStore.get() ? "key in use for this tab" : "no key";
  status.classList.toggle("has-key", Boolean(keyStore.get()));
}

function setUp() {
  const form = document.getElementById("key-form");
  const input = document.getElementById("key-input");
  form.addEventListener("submit", (event) => {
    event.preventDefault();
    const key = input.value.trim();
    if (key) keyStore.set(key);
    input.value = "";
    showKeyStatus();
    render();
  });
  document.getElementById("key-forget").addEventListener("click", () => {
    keyStore.clear();
    showKeyStatus();
    render();
  });
  window.addEventListener("hashchange", render);
  showKeyStatus();
  render();
}

setUp();
