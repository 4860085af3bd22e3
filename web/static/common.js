// Shared helpers for kinscope's pages: requests to this server only, formatting, small DOM helpers.

export class ApiError extends Error {}

/** GET or POST a JSON endpoint of this server; any failure becomes an ApiError with a plain sentence. */
export async function api(path, params = null, options = {}) {
  const url = params ? `${path}?${query(params)}` : path;
  let response;
  try {
    response = await fetch(url, { credentials: "same-origin", ...options });
  } catch (err) {
    throw new ApiError("the kinscope server cannot be reached. Is it still running?");
  }
  let body = null;
  try {
    body = await response.json();
  } catch (err) {
    body = null;
  }
  if (!response.ok) {
    const message = body && typeof body.error === "string" ? body.error : `the server answered with status ${response.status}`;
    throw new ApiError(message);
  }
  if (body === null) throw new ApiError("the server sent an answer this page cannot read");
  return body;
}

/** A query string from an object; empty values are left out. */
export function query(params) {
  const out = new URLSearchParams();
  for (const [key, value] of Object.entries(params)) {
    if (value === null || value === undefined || value === "") continue;
    out.set(key, Array.isArray(value) ? value.map((v) => round4(v)).join(",") : String(value));
  }
  return out.toString();
}

export function round4(v) {
  return Math.round(v * 10000) / 10000;
}

/** Create an element: el("p", {class: "x", text: "hi"}, child, ...). */
export function el(tag, attrs = {}, ...children) {
  const node = document.createElement(tag);
  for (const [key, value] of Object.entries(attrs)) {
    if (value === null || value === undefined || value === false) continue;
    if (key === "class") node.className = value;
    else if (key === "text") node.textContent = value;
    else if (key === "dataset") Object.assign(node.dataset, value);
    else if (key.startsWith("on") && typeof value === "function") node.addEventListener(key.slice(2), value);
    else if (value === true) node.setAttribute(key, "");
    else node.setAttribute(key, String(value));
  }
  for (const child of children.flat()) {
    if (child === null || child === undefined || child === false) continue;
    node.append(child instanceof Node ? child : document.createTextNode(String(child)));
  }
  return node;
}

/** A file name or path as nodes that may wrap only after "/", "_" or "-" (a <wbr> there), never inside a word
    or a number; style.css breaks a single part longer than its box only as a last resort. */
export function breakable(text) {
  const parts = String(text ?? "").split(/(?<=[/_-])/);
  return parts.flatMap((part, i) => (i ? [document.createElement("wbr"), part] : [part]));
}

export function formatScore(score) {
  return Number(score).toFixed(3);
}

export function formatPercent(fraction) {
  const p = fraction * 100;
  if (p >= 10) return `${p.toFixed(0)}%`;
  if (p >= 0.1) return `${p.toFixed(1)}%`;
  return "under 0.1%";
}

/** A file size in decimal units with one decimal, "39.1 kB", "2.4 MB": as the item page, the duplicate report
    and the command line write it (index/common/units.py size_text; the page's footer states the convention). */
export function formatSize(bytes) {
  if (bytes === null || bytes === undefined) return "";
  if (bytes < 1000) return `${bytes} ${bytes === 1 ? "byte" : "bytes"}`;
  const units = ["kB", "MB", "GB", "TB"];
  for (let i = 0; i < units.length; i += 1) {
    const step = 1000 ** (i + 1);
    const tenths = Math.floor((bytes * 10 + step / 2) / step); // half up, in whole numbers as size_text does
    if (tenths < 10000 || i === units.length - 1) return `${Math.floor(tenths / 10)}.${tenths % 10} ${units[i]}`;
  }
  return "";
}

/** Folder shown relative to the archive's common root, which `setRoot` learns from /api/folders. */
let archiveRoot = "";

export function setRoot(folders) {
  const paths = folders.map((f) => f.folder);
  if (paths.length === 0) return;
  let prefix = paths[0];
  for (const p of paths) {
    while (prefix && !(p === prefix || p.startsWith(prefix.endsWith("/") ? prefix : prefix + "/"))) {
      prefix = prefix.slice(0, Math.max(0, prefix.lastIndexOf("/")));
    }
  }
  // With one folder only, show its own name rather than nothing.
  archiveRoot = paths.length === 1 ? paths[0].slice(0, paths[0].lastIndexOf("/")) : prefix;
}

export function shortFolder(folder) {
  if (!folder) return "";
  if (archiveRoot && folder.startsWith(archiveRoot + "/")) return folder.slice(archiveRoot.length + 1);
  if (archiveRoot && folder === archiveRoot) return "(top folder)";
  return folder;
}

/** Where a box [x0, y0, x1, y1] lies in plain words: "top left", "centre", "bottom right". */
export function whereIs(box) {
  const cx = (box[0] + box[2]) / 2;
  const cy = (box[1] + box[3]) / 2;
  const row = cy < 1 / 3 ? "top" : cy > 2 / 3 ? "bottom" : "middle";
  const col = cx < 1 / 3 ? "left" : cx > 2 / 3 ? "right" : "centre";
  if (row === "middle" && col === "centre") return "centre";
  if (row === "middle") return `middle ${col}`;
  if (col === "centre") return `${row} centre`;
  return `${row} ${col}`;
}

/** Show or hide a message element (role="alert"). */
export function showMessage(node, text) {
  if (!node) return;
  if (text) {
    node.textContent = text;
    node.hidden = false;
  } else {
    node.textContent = "";
    node.hidden = true;
  }
}

/** A result card: the main button opens the explanation; actions below. */
export function resultCard(result, rank, { onExplain, onUse, explainHref } = {}) {
  const details = [`${result.width} × ${result.height}`, formatSize(result.size)].filter(Boolean);
  const meta = el("span", { class: "result-meta" }, el("span", { class: "result-folder" }, breakable(shortFolder(result.folder))));
  const line = el("span", { class: "result-meta" });
  details.forEach((d, i) => line.append(i ? " · " : "", el("span", { class: i ? "result-size" : null, text: d })));
  const date = result.date ? el("span", { class: "result-meta" }, el("span", { class: "result-date", text: result.date })) : null;
  const img = el("img", {
    src: result.thumbnail,
    alt: `Thumbnail of ${result.name}`,
    loading: "lazy",
    decoding: "async",
    width: 256,
    height: 256,
  });
  const inner = [
    el("span", { class: "thumb" }, img, el("span", { class: "rank", text: String(rank) })),
    el(
      "span",
      { class: "result-text" },
      el("span", { class: "score-line" }, el("span", { class: "score-label", text: "score" }), el("span", { class: "score", text: formatScore(result.score) })),
      el("span", { class: "result-name" }, breakable(result.name)),
      meta,
      line,
      date,
      el("span", { class: "why", text: "Why it matched" }),
    ),
  ];
  const main = explainHref
    ? el("a", { class: "result-main", href: explainHref }, ...inner)
    : el("button", { type: "button", class: "result-main", onclick: () => onExplain && onExplain(result) }, ...inner);
  main.title = result.path;
  const actions = el("span", { class: "result-actions" }, el("a", { href: result.page, text: "Details" }));
  if (onUse) {
    actions.append(el("button", { type: "button", class: "link-button", text: "Use as query", title: `Search the archive with ${result.name}`, onclick: () => onUse(result) }));
  }
  return el("li", { class: "result", dataset: { id: result.id } }, main, actions);
}
