// The search page: give a query (file, drop, paste, archive item), choose a layer, filter, draw a
// region, page through results, and open "why it matched" for any of them. Talks to /api only.
import { ApiError, api, breakable, el, query, resultCard, setRoot, shortFolder, showMessage } from "./common.js";
import { setUpCautions } from "./cautions.js";
import { setUpPicker } from "./picker.js";
import { clearExplanation, renderExplanation } from "./explain.js";
import { createExtras, createMarks } from "./feedback.js";
import { setUpRegion } from "./region.js";

const PAGE = 24;

const $ = (id) => document.getElementById(id);
const app = $("app");

const state = {
  query: null, // {kind: "upload", upload, image, label} | {kind: "item", item, image, label}
  box: null, // [x0, y0, x1, y1] fractions of the query image
  layer: app.dataset.defaultLayer,
  defaultLayer: app.dataset.defaultLayer,
  results: [],
  more: false,
  seq: 0,
  layers: {}, // name -> {hint, channels}
  explainCache: new Map(),
};

// --- elements -------------------------------------------------------------------------------
const fileInput = $("file-input");
const dropzone = $("dropzone");
const dropOverlay = $("drop-overlay");
const queryError = $("query-error");
const queryView = $("query-view");
const queryImage = $("query-image");
const queryLabel = $("query-label");
const filterForm = $("filter-form");
const folderFilter = $("folder-filter");
const dateFrom = $("date-from");
const dateTo = $("date-to");
const dateError = $("date-error");
const statusLine = $("status");
const searchError = $("search-error");
const start = $("start");
const resultsList = $("results");
const moreButton = $("more-button");
const explainDialog = $("explain-dialog");
const explainTitle = $("explain-title");
const explainBody = $("explain-body");
const browserDialog = $("browser-dialog");
const browserFolder = $("browser-folder");
const marks = createMarks($("marks-panel"), () => runSearch()); // like/unlike marks (feedback.js)
const extras = createExtras($("extra-examples"), () => runSearch()); // more example images (feedback.js)

// --- query ----------------------------------------------------------------------------------
function queryParams() {
  if (!state.query) return {};
  return state.query.kind === "upload" ? { upload: state.query.upload } : { item: state.query.item };
}

function layerText(name) {
  const hint = state.layers[name] && state.layers[name].hint;
  const label = name.charAt(0).toUpperCase() + name.slice(1);
  return hint ? `${label} (${hint})` : label;
}

function setQuery(q) {
  state.query = q;
  state.box = null;
  state.explainCache.clear();
  marks.clear();
  extras.clear();
  showMessage(queryError, "");
  queryView.hidden = false;
  dropzone.classList.add("is-compact");
  start.hidden = true;
  queryImage.alt = `The query image: ${q.label}`;
  queryLabel.replaceChildren(...breakable(q.label));
  queryImage.src = q.image;
  region.show(null);
  updateURL();
  runSearch({ reveal: true });
}

async function uploadFile(file, how) {
  if (!file) return;
  showMessage(queryError, "");
  statusLine.textContent = "Reading the image…";
  const form = new FormData();
  const name = file.name || "pasted image";
  form.append("file", file, name);
  try {
    const r = await api("/api/queries", null, { method: "POST", body: form });
    setQuery({ kind: "upload", upload: r.upload, image: r.image, label: how === "paste" ? "Pasted image" : name });
  } catch (err) {
    statusLine.textContent = "";
    showMessage(queryError, err instanceof ApiError ? err.message : "the image could not be sent to the server");
  }
}

function useItem(item) {
  if (explainDialog.open) explainDialog.close();
  if (browserDialog.open) browserDialog.close();
  setQuery({ kind: "item", item: item.id, image: `/media/items/${item.id}/image`, label: item.name, path: item.path });
}

fileInput.addEventListener("change", () => {
  uploadFile(fileInput.files[0], "file");
  fileInput.value = "";
});

// Drag and drop anywhere on the page.
let dragDepth = 0;
const hasFiles = (e) => e.dataTransfer && Array.from(e.dataTransfer.types || []).includes("Files");
document.addEventListener("dragenter", (e) => {
  if (!hasFiles(e) || explainDialog.open || browserDialog.open) return;
  e.preventDefault();
  dragDepth += 1;
  dropOverlay.hidden = false;
  document.body.classList.add("is-dragging");
});
document.addEventListener("dragover", (e) => {
  if (!hasFiles(e)) return;
  e.preventDefault();
  e.dataTransfer.dropEffect = "copy";
});
document.addEventListener("dragleave", (e) => {
  if (!hasFiles(e)) return;
  dragDepth = Math.max(0, dragDepth - 1);
  if (dragDepth === 0) {
    dropOverlay.hidden = true;
    document.body.classList.remove("is-dragging");
  }
});
document.addEventListener("drop", (e) => {
  if (!hasFiles(e)) return;
  e.preventDefault();
  dragDepth = 0;
  dropOverlay.hidden = true;
  document.body.classList.remove("is-dragging");
  const file = e.dataTransfer.files[0];
  if (file) uploadFile(file, "drop");
});

// Paste an image from the clipboard.
document.addEventListener("paste", (e) => {
  if (explainDialog.open || browserDialog.open) return;
  const items = Array.from((e.clipboardData && e.clipboardData.items) || []);
  const image = items.find((i) => i.kind === "file" && i.type.startsWith("image/"));
  const inField = e.target instanceof HTMLInputElement || e.target instanceof HTMLTextAreaElement;
  if (image) {
    e.preventDefault();
    uploadFile(image.getAsFile(), "paste");
  } else if (!inField) {
    showMessage(queryError, "the clipboard holds no image. Copy an image (not its file name) and paste again.");
  }
});

// --- region box (region.js) ------------------------------------------------------------------
const region = setUpRegion(
  { canvas: $("region-canvas"), image: queryImage, status: $("region-state"), clear: $("region-clear"),
    form: $("region-form"), error: queryError },
  { hasQuery: () => Boolean(state.query), current: () => state.box, onChange: setBox },
);
queryImage.addEventListener("error", () => {
  if (state.query) showMessage(queryError, "the query image cannot be shown; upload it again.");
});

function setBox(box) {
  showMessage(queryError, "");
  state.box = box;
  state.explainCache.clear();
  region.show(box);
  updateURL();
  runSearch();
}

// --- layer and filters ----------------------------------------------------------------------
document.querySelectorAll('input[name="layer"]').forEach((radio) => {
  radio.addEventListener("change", () => {
    if (!radio.checked) return;
    state.layer = radio.value;
    state.explainCache.clear();
    updateURL();
    if (state.query) runSearch();
  });
});

folderFilter.addEventListener("change", () => state.query && runSearch());
dateFrom.addEventListener("change", () => (state.query ? runSearch() : datesInOrder(filters())));
dateTo.addEventListener("change", () => (state.query ? runSearch() : datesInOrder(filters())));
filterForm.addEventListener("submit", (e) => e.preventDefault());
filterForm.addEventListener("reset", () => setTimeout(() => (state.query ? runSearch() : datesInOrder(filters())), 0));

function filters() {
  return { folder: folderFilter.value, date_from: dateFrom.value, date_to: dateTo.value };
}

// --- searching ------------------------------------------------------------------------------
const stacked = window.matchMedia("(max-width: 640px)"); // the columns stack (style.css)

/** Bring the results into view after a search when they are out of it: after a new query, or any search
    while the columns are stacked (the results then lie below the query and the filters). */
function revealResults(newQuery) {
  const heading = $("results-heading");
  const first = (resultsList.firstElementChild || statusLine).getBoundingClientRect().top;
  if (heading.getBoundingClientRect().top >= 0 && first < window.innerHeight - 120) return; // in view already
  if (newQuery || stacked.matches) heading.scrollIntoView({ block: "start" });
}

/** A "from" date after the "to" date: said beside the fields, and the results shown so far are marked as
    no longer answering the filters (dimmed, with a line saying so) until the dates are put right. */
function datesInOrder(f) {
  const wrong = Boolean(f.date_from && f.date_to && f.date_from > f.date_to);
  showMessage(dateError, wrong ? "the “from” date is after the “to” date: swap them or clear one." : "");
  for (const input of [dateFrom, dateTo]) input.toggleAttribute("aria-invalid", wrong);
  if (wrong) {
    state.seq += 1; // a search still under way would answer the old dates
    resultsList.dataset.stale = "true";
    moreButton.hidden = true;
    statusLine.textContent = state.results.length ? "These results are for the earlier filters: the dates need fixing." : "";
  } else {
    delete resultsList.dataset.stale;
  }
  return !wrong;
}

async function runSearch({ append = false, reveal = false } = {}) {
  if (!state.query) return;
  const f = filters();
  if (!datesInOrder(f)) return;
  const seq = ++state.seq;
  const offset = append ? state.results.length : 0;
  showMessage(searchError, "");
  resultsList.setAttribute("aria-busy", "true");
  // Not `disabled`: a disabled button drops the keyboard focus to <body> while the next page loads.
  moreButton.setAttribute("aria-disabled", "true");
  statusLine.textContent = append ? "Loading more results…" : "Searching…";
  try {
    const r = await api("/api/search", { ...extras.params(queryParams()), ...marks.params(), layer: state.layer, box: state.box, k: PAGE, offset, ...f });
    if (seq !== state.seq) return; // a newer search has started
    if (!append) {
      state.results = [];
      resultsList.replaceChildren();
      marks.forgetCards();
    }
    const first = state.results.length;
    state.results.push(...r.results);
    state.more = r.more;
    resultsList.dataset.layer = r.layer;
    resultsList.dataset.box = r.query.box ? r.query.box.map((v) => v.toFixed(3)).join(",") : "";
    r.results.forEach((res, i) => {
      const card = resultCard(res, first + i + 1, { onExplain: openExplanation, onUse: useItem });
      marks.decorate(card, res);
      resultsList.append(card);
    });
    const moreHadFocus = document.activeElement === moreButton;
    moreButton.hidden = !r.more;
    describeResults();
    if (append && moreHadFocus && resultsList.children[first]) {
      resultsList.children[first].querySelector(".result-main").focus(); // carry on reading where the new ones start
    }
    if (!append) revealResults(reveal);
  } catch (err) {
    if (seq !== state.seq) return;
    statusLine.textContent = "";
    if (!append) {
      state.results = [];
      resultsList.replaceChildren();
      moreButton.hidden = true;
    }
    showMessage(searchError, err.message);
  } finally {
    if (seq === state.seq) {
      resultsList.removeAttribute("aria-busy");
      moreButton.removeAttribute("aria-disabled");
    }
  }
}

function describeResults() {
  const n = state.results.length;
  const f = filters();
  const parts = [];
  if (n === 0) {
    statusLine.textContent = f.folder || f.date_from || f.date_to
      ? "No item passes these filters. Widen the folder or the dates."
      : "No results.";
    return;
  }
  parts.push(`${n} ${n === 1 ? "item" : "items"} most like the query, best first, compared by ${layerText(state.layer)}`);
  if (state.box) parts.push("using the marked region");
  if (f.folder) parts.push(`in ${shortFolder(f.folder)}`);
  if (f.date_from || f.date_to) parts.push(`dated ${f.date_from || "…"} to ${f.date_to || "…"}`);
  let text = parts.join(", ") + ".";
  if (state.more) text += " More below.";
  statusLine.textContent = text;
}

moreButton.addEventListener("click", () => {
  if (moreButton.getAttribute("aria-disabled") !== "true") runSearch({ append: true });
});

// --- URL: an item query, its layer and region can be bookmarked -----------------------------
function updateURL() {
  const params = {};
  if (state.query && state.query.kind === "item") {
    params.item = state.query.item;
    if (state.box) params.box = state.box;
  }
  if (state.layer !== state.defaultLayer) params.layer = state.layer;
  const qs = query(params);
  history.replaceState(null, "", qs ? `?${qs}` : window.location.pathname);
}

// --- explanation ----------------------------------------------------------------------------
let explainOpener = null;

// With several example images, a match is explained against one example at a time (a combined query
// has no image of its own); `which` picks it: 0 = the query, 1.. = the added examples.
function exampleChooser(result, which) {
  const examples = extras.list();
  if (!examples.length) return null;
  const names = [state.query.label || "the query image", ...examples.map((x) => x.name)];
  const select = el("select", { id: "explain-example", "aria-label": "Explain against which example" },
    ...names.map((name, i) => el("option", { value: String(i), text: `${i + 1}. ${name}`, selected: i === which })));
  select.addEventListener("change", () => openExplanation(result, Number(select.value), true));
  return el("p", { class: "explain-example" },
    el("label", { for: "explain-example", text: "Explained against example " }), select,
    el("span", { class: "fine", text: ` (the search combined ${names.length} examples; each is explained on its own)` }));
}

async function openExplanation(result, which = 0, refocus = false) {
  explainOpener = explainOpener && explainDialog.open ? explainOpener : document.activeElement;
  explainTitle.replaceChildren("Why ", ...breakable(result.name), " matched");
  clearExplanation(explainBody);
  explainBody.append(el("p", { class: "loading", role: "status", text: "Working out where the similarity comes from…" }));
  if (!explainDialog.open) explainDialog.showModal();
  const extra = which > 0 ? extras.list()[which - 1] : null;
  const params = extra ? { upload: extra.upload, match: result.id, layer: state.layer }
    : { ...queryParams(), match: result.id, layer: state.layer, box: state.box };
  const key = query(params);
  try {
    let data = state.explainCache.get(key);
    if (!data) {
      data = await api("/api/explain", params);
      state.explainCache.set(key, data);
    }
    if (!explainDialog.open) return;
    const layer = state.layers[data.layer] || {};
    renderExplanation(explainBody, data, {
      queryImage: extra ? extra.image : state.query.image,
      queryLabel: extra ? extra.name : state.query.label,
      box: extra ? null : state.box,
      layer: data.layer,
      layerHint: layer.hint,
      channels: layer.channels,
      onUse: useItem,
    });
    if (data.note) explainBody.prepend(el("p", { class: "fine explain-note", text: data.note }));
    const chooser = exampleChooser(result, which);
    if (chooser) explainBody.prepend(chooser);
    if (chooser && refocus) $("explain-example").focus(); // the chooser was redrawn: keep the keyboard on it
  } catch (err) {
    clearExplanation(explainBody);
    const chooser = exampleChooser(result, which);
    explainBody.append(...(chooser ? [chooser] : []), el("p", { class: "message message-error", role: "alert", text: err.message }));
  }
}

explainDialog.addEventListener("close", () => {
  clearExplanation(explainBody);
  if (explainOpener && document.contains(explainOpener)) explainOpener.focus();
  explainOpener = null;
});

for (const dialog of [explainDialog, browserDialog]) {
  dialog.querySelectorAll("[data-close]").forEach((b) => b.addEventListener("click", () => dialog.close()));
  // A click on the dimmed backdrop (outside the box) closes it too.
  dialog.addEventListener("click", (e) => {
    if (e.target !== dialog) return;
    const r = dialog.getBoundingClientRect();
    if (e.clientX < r.left || e.clientX > r.right || e.clientY < r.top || e.clientY > r.bottom) dialog.close();
  });
}

// --- archive picker (picker.js) -------------------------------------------------------------
const picker = setUpPicker(useItem);
$("browse-button").addEventListener("click", () => picker.open());
$("start-browse").addEventListener("click", () => picker.open());

// --- start-up -------------------------------------------------------------------------------
async function startUp() {
  setUpCautions();
  try {
    const [info, folders] = await Promise.all([api("/api/info"), api("/api/folders")]);
    for (const l of info.layers) state.layers[l.name] = { hint: l.hint, channels: l.channels };
    setRoot(folders.folders);
    for (const select of [folderFilter, browserFolder]) {
      for (const f of folders.folders) {
        select.append(el("option", { value: f.folder, text: `${shortFolder(f.folder)} (${f.count.toLocaleString()})` }));
      }
    }
  } catch (err) {
    showMessage(searchError, err.message);
  }

  // A bookmarked search: ?item=ID&layer=NAME&box=x0,y0,x1,y1&explain=ID
  const params = new URLSearchParams(window.location.search);
  const layer = params.get("layer");
  if (layer) {
    const radio = document.querySelector(`input[name="layer"][value="${CSS.escape(layer)}"]`);
    if (radio) {
      radio.checked = true;
      state.layer = layer;
    }
  }
  const itemId = params.get("item");
  if (itemId && /^\d+$/.test(itemId)) {
    try {
      const item = await api(`/api/items/${itemId}`);
      setQuery({ kind: "item", item: item.id, image: item.image, label: item.name, path: item.path });
      const box = (params.get("box") || "").split(",").map(Number);
      if (box.length === 4 && box.every(Number.isFinite) && box[0] < box[2] && box[1] < box[3]) setBox(box);
      const explain = params.get("explain");
      if (explain && /^\d+$/.test(explain)) {
        const match = await api(`/api/items/${explain}`);
        openExplanation(match);
      }
    } catch (err) {
      showMessage(queryError, err.message);
    }
  }
  app.dataset.ready = "true";
}

startUp();
