// Like / unlike marks on the search page's results. A mark refines the query in place: the server
// combines the query with the marked items by Rocchio's rule (docs/retrieval.md) and searches again.
// The marks are listed in their own panel, each can be removed, the last change undone, and the
// list exported as paths (CSV or JSON, made in the browser; nothing is sent anywhere). More example images
// can be added to the query (createExtras): they count as much as the first one.
import { ApiError, api, el, shortFolder } from "./common.js";

const LABEL = { like: "Toward", unlike: "Away" }; // short, so both fit one row of a narrow card
const MEANING = { like: "More like this", unlike: "Not like this" };

/** The marks of one query. `panel`: an empty element to draw the list in; `onChange()`: search again. */
export function createMarks(panel, onChange) {
  const marks = new Map(); // id -> {mark, id, name, path, folder, thumbnail}
  const undo = []; // [id, the mark before the change (or null)], last change last
  const cards = new Map(); // id -> result card elements showing that item (re-drawn on each change)

  function set(result, mark) {
    const before = marks.has(result.id) ? marks.get(result.id).mark : null;
    if (before === mark) return;
    undo.push([result.id, before, before ? marks.get(result.id) : null]);
    apply(result, mark);
    changed();
  }

  function apply(result, mark) {
    if (mark) {
      const { id, name, path, folder, thumbnail } = result;
      marks.set(id, { mark, id, name, path, folder, thumbnail });
    } else {
      marks.delete(result.id);
    }
  }

  function changed() {
    for (const [id, list] of cards) list.forEach((card) => paint(card, id));
    draw();
    onChange();
  }

  function paint(card, id) {
    const mark = marks.has(id) ? marks.get(id).mark : null;
    card.classList.toggle("is-liked", mark === "like");
    card.classList.toggle("is-unliked", mark === "unlike");
    card.dataset.mark = mark || "";
    card.querySelectorAll("[data-mark]").forEach((b) => b.setAttribute("aria-pressed", String(b.dataset.mark === mark)));
    const badge = card.querySelector(".mark-badge");
    badge.hidden = !mark;
    badge.textContent = mark === "like" ? "Marked: more like this" : mark === "unlike" ? "Marked: not like this" : "";
  }

  /** Add the two mark buttons to a result card (a toggle: pressing a pressed one removes the mark). */
  function decorate(card, result) {
    const row = el("span", { class: "mark-row", role: "group", "aria-label": `Mark ${result.name}` });
    for (const mark of ["like", "unlike"]) {
      row.append(el("button", {
        type: "button", class: `mark-button mark-${mark}`, dataset: { mark }, "aria-pressed": "false", text: LABEL[mark],
        title: `${MEANING[mark]}: search again with this mark`, "aria-label": `${MEANING[mark]}: ${result.name}`,
        onclick: () => set(result, marks.has(result.id) && marks.get(result.id).mark === mark ? null : mark),
      }));
    }
    card.append(el("span", { class: "mark-badge", hidden: true }), row);
    if (!cards.has(result.id)) cards.set(result.id, []);
    cards.get(result.id).push(card);
    paint(card, result.id);
  }

  function draw() {
    panel.replaceChildren();
    panel.hidden = marks.size === 0 && undo.length === 0;
    const likes = [...marks.values()].filter((m) => m.mark === "like").length;
    panel.append(
      el("h2", { id: "marks-heading", text: "Your marks" }),
      el("p", { class: "fine", text: "Results marked “more like this” pull the search towards them, those marked “not like this” "
        + "push it away (Rocchio’s rule: the query counts 1, the likes 0.75, the unlikes 0.15). The results change at each mark." }),
      el("p", { class: "marks-count", role: "status", text: `${likes} marked more like this, ${marks.size - likes} marked not like this.` }),
    );
    const list = el("ul", { class: "marks-list", "aria-label": "Marked items" });
    for (const m of marks.values()) {
      list.append(el("li", { class: `marks-item is-${m.mark}`, dataset: { id: m.id, mark: m.mark } },
        el("img", { src: `${m.thumbnail}?size=128`, alt: "", width: 48, height: 48, loading: "lazy" }),
        el("span", { class: "marks-text" }, el("span", { class: "marks-name", text: m.name, title: m.path }),
          el("span", { class: "fine", text: `${m.mark === "like" ? "like" : "unlike"} · ${shortFolder(m.folder)}` })),
        el("button", { type: "button", class: "link-button", text: "Remove", "aria-label": `Remove the mark on ${m.name}`,
          onclick: () => set(m, null) })));
    }
    const tools = el("div", { class: "marks-tools" },
      el("button", { type: "button", class: "button button-small", id: "marks-undo", text: "Undo last change",
        disabled: undo.length === 0, onclick: undoLast }),
      el("button", { type: "button", class: "button button-small", text: "Clear all marks", disabled: marks.size === 0,
        onclick: () => clear(true) }),
      el("button", { type: "button", class: "button button-small", id: "marks-csv", text: "Export CSV",
        disabled: marks.size === 0, onclick: () => save("csv") }),
      el("button", { type: "button", class: "button button-small", id: "marks-json", text: "Export JSON",
        disabled: marks.size === 0, onclick: () => save("json") }));
    panel.append(list, tools);
  }

  function undoLast() {
    const last = undo.pop();
    if (!last) return;
    const [id, before, entry] = last;
    apply(entry || { id }, before);
    changed();
  }

  /** Forget every mark (a new query); `search` true: search again (the user cleared them). */
  function clear(search = false) {
    if (search && marks.size) {
      for (const m of marks.values()) undo.push([m.id, m.mark, m]);
      marks.clear();
      changed();
      return;
    }
    marks.clear();
    undo.length = 0;
    cards.clear();
    draw();
  }

  /** Result cards are about to be replaced: forget the old ones. */
  function forgetCards() {
    cards.clear();
  }

  function save(kind) {
    const rows = [...marks.values()].map((m) => ({ mark: m.mark, id: m.id, path: m.path }));
    const text = kind === "json"
      ? JSON.stringify({ marks: rows }, null, 2) + "\n"
      : "mark,id,path\n" + rows.map((r) => `${r.mark},${r.id},${csvField(r.path)}`).join("\n") + "\n";
    const blob = new Blob([text], { type: kind === "json" ? "application/json" : "text/csv" });
    const link = el("a", { href: URL.createObjectURL(blob), download: `kinscope-marks.${kind}` });
    document.body.append(link);
    link.click();
    link.remove();
    setTimeout(() => URL.revokeObjectURL(link.href), 10_000);
  }

  /** What /api/search takes: the marked ids (comma-separated lists; none: left out of the address). */
  function params() {
    const ids = (mark) => [...marks.values()].filter((m) => m.mark === mark).map((m) => m.id).join(",") || null;
    return { like_item: ids("like"), unlike_item: ids("unlike") };
  }

  draw();
  return { decorate, clear, forgetCards, params, get size() { return marks.size; } };
}

function csvField(value) {
  const s = String(value);
  return /[",\n\r]/.test(s) ? `"${s.replace(/"/g, '""')}"` : s;
}

/** More example images beside the query (uploaded to this server, kept like the first one). `box`: an
 * element to draw into; `onChange()`: search again. */
export function createExtras(box, onChange) {
  const extras = []; // {upload, image, name}
  const input = el("input", { type: "file", id: "extra-input", class: "file-input", accept: "image/*,.heic,.heif,.tif,.tiff" });
  const error = el("p", { class: "message message-error", role: "alert", hidden: true });
  const list = el("ul", { class: "marks-list", id: "extra-list", "aria-label": "More example images" });
  box.append(
    el("p", { class: "fine", text: "More images of what you want count as much as this one (their descriptors are averaged)." }),
    input, el("label", { for: "extra-input", class: "button button-small", text: "Add another example image…" }), error, list,
  );

  input.addEventListener("change", async () => {
    const file = input.files[0];
    input.value = "";
    if (!file) return;
    error.hidden = true;
    const form = new FormData();
    form.append("file", file, file.name || "image");
    try {
      const r = await api("/api/queries", null, { method: "POST", body: form });
      extras.push({ upload: r.upload, image: r.image, name: file.name || "image" });
      draw();
      onChange();
    } catch (err) {
      error.textContent = err instanceof ApiError ? err.message : "the image could not be sent to the server";
      error.hidden = false;
    }
  });

  function draw() {
    list.replaceChildren(...extras.map((x, i) => el("li", { class: "marks-item", dataset: { upload: x.upload } },
      el("img", { src: x.image, alt: "", width: 48, height: 48 }),
      el("span", { class: "marks-text" }, el("span", { class: "marks-name", text: x.name })),
      el("button", { type: "button", class: "link-button", text: "Remove", "aria-label": `Remove the example ${x.name}`,
        onclick: () => { extras.splice(i, 1); draw(); onChange(); } }))));
  }

  /** The search parameters with the extra uploads after the query's own (the server takes a posted file,
   * items, then uploads, so the query stays the first example and keeps its region). */
  function params(base) {
    const uploads = [base.upload, ...extras.map((x) => x.upload)].filter(Boolean);
    return { ...base, upload: uploads.join(",") || null };
  }

  function clear() {
    extras.length = 0;
    draw();
  }

  /** The extra examples, for explaining a match against each of them: [{upload, image, name}]. */
  function list_() {
    return extras.map((x) => ({ ...x }));
  }

  return { params, clear, list: list_, get size() { return extras.length; } };
}
