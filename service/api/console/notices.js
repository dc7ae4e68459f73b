// How the console says that something failed, or that the server lacks a feature.

import { ApiError } from "./api.js";
import { h } from "./dom.js";

export function errorView(error) {
  if (error instanceof ApiError && error.status === 401) {
    return h(
      "section",
      { class: "panel notice warn", dataset: { code: error.code } },
      h("h2", null, "A key is needed"),
      h("p", null, error.message, " Paste a key in the field at the top and press Use key."),
    );
  }
  return h(
    "section",
    { class: "panel notice bad", dataset: { code: (error && error.code) || "error" } },
    h("h2", null, "That did not work"),
    h("p", { class: "error-message" }, (error && error.message) || String(error)),
  );
}

export function errorLine(error) {
  return h(
    "p",
    { class: "notice bad inline", dataset: { code: (error && error.code) || "error" } },
    (error && error.message) || String(error),
  );
}

export function notAvailable(what) {
  return h(
    "p",
    { class: "notice warn inline not-available" },
    `${what} is not available on this server.`,
  );
}

export function caution(text) {
  return text ? h("p", { class: "caution" }, h("strong", null, "Caution. "), text) : null;
}
