// The HTTP API as the console calls it: the pasted key goes in the Authorization header and
// lives in sessionStorage only, so closing the tab forgets it.

const KEY_ITEM = "excerpta.console.key";

export const keyStore = {
  get: () => sessionStorage.getItem(KEY_ITEM) || "",
  set: (key) => sessionStorage.setItem(KEY_ITEM, key),
  clear: () => sessionStorage.removeItem(KEY_ITEM),
};

export class ApiError extends Error {
  constructor(status, body) {
    const error = (body && body.error) || {};
    super(error.message || `The server answered ${status}.`);
    this.status = status;
    this.code = error.code || "http_error";
    this.details = error;
  }
}

export async function call(method, path, body) {
  const headers = { Accept: "application/json" };
  const key = keyStore.get();
  if (key) headers.Authorization = `Bearer ${key}`;
  const init = { method, headers, cache: "no-store" };
  if (body !== undefined) {
    headers["Content-Type"] = "application/json";
    init.body = JSON.stringify(body);
  }
  let response;
  try {
    response = await fetch(path, init);
  } catch {
    throw new ApiError(0, { error: { code: "unreachable", message: "The server could not be reached." } });
  }
  const text = await response.text();
  let data = null;
  try {
    data = text ? JSON.parse(text) : null;
  } catch {
    data = null;
  }
  if (!response.ok) throw new ApiError(response.status, data);
  return data;
}

export const get = (path) => call("GET", path);
export const post = (path, body) => call("POST", path, body);

/** True when the server has no such route: an older server, or a feature not built into it. */
export function routeMissing(error) {
  return error instanceof ApiError && (error.code === "route_not_found" || error.code === "method_not_allowed");
}

export const part = encodeURIComponent;

export async function collectionNames() {
  const listing = await get("/v1/collections");
  return listing.collections.map((collection) => collection.name);
}
