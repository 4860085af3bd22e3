// The duplicate review page: groups side by side, a person's decisions, and the plan export.
// Nothing here moves a file: the plan is downloaded and applied from the command line.
import { api, breakable, el, formatScore, formatSize, showMessage } from "./common.js";

const list = document.getElementById("dup-groups");
const statusLine = document.getElementById("dup-status");
const errorLine = document.getElementById("dup-error");
const moreButton = document.getElementById("dup-more");
const settingsForm = document.getElementById("dup-settings");
const planForm = document.getElementById("plan-form");
const planSummary = document.getElementById("dup-plan-summary");
const PAGE = 20;

let groups = []; // as sent by /api/duplicates, plus `state` (the person's decisions)
let total = 0;
let settings = {};
let meta = null;

/** A group's decisions: parts (split-off groups) with their keeper, each member's part, "not a copy" marks. */
function initialState(g) {
  const part = {};
  g.members.forEach((m) => (part[m.id] = 0));
  return { parts: [{ keeper: g.keeper, chosen: false }], part, excluded: new Set() };
}

function partId(g, p) {
  return p === 0 ? String(g.id) : `${g.id}-${p + 1}`;
}

function membersOf(g, p) {
  return g.members.filter((m) => g.state.part[m.id] === p && !g.state.excluded.has(m.id));
}

/** Keep every part's keeper one of its members: when the keeper left, the first remaining member stays. */
function repairKeepers(g) {
  g.state.parts.forEach((part, p) => {
    const here = membersOf(g, p);
    if (!here.some((m) => m.id === part.keeper)) {
      part.keeper = here.length ? here[0].id : null;
      part.chosen = false;
      part.auto = true;
    }
  });
}

function decisionWords(g, m) {
  if (g.state.excluded.has(m.id)) return { key: "not-copy", text: "not a copy: stays where it is" };
  const part = g.state.parts[g.state.part[m.id]];
  if (part.keeper !== m.id) return { key: "moves", text: "would move" };
  if (part.chosen) return { key: "stays", text: "stays: your choice" };
  if (part.auto) return { key: "stays", text: "stays: first file of this part (change it if needed)" };
  return { key: "stays", text: `stays: ${g.keeper_reason}` };
}

function memberCard(g, m) {
  const p = g.state.part[m.id];
  const words = decisionWords(g, m);
  const name = `keep-${g.id}-${p}`;
  const keep = el("input", { type: "radio", name, id: `keep-${g.id}-${m.id}`, checked: words.key === "stays" });
  keep.disabled = g.state.excluded.has(m.id);
  keep.addEventListener("change", () => {
    g.state.parts[p].keeper = m.id;
    g.state.parts[p].chosen = m.id !== g.keeper || p !== 0;
    g.state.parts[p].auto = false;
    update(g);
  });
  const notCopy = el("input", { type: "checkbox", id: `notcopy-${g.id}-${m.id}`, checked: g.state.excluded.has(m.id) });
  notCopy.addEventListener("change", () => {
    if (notCopy.checked) g.state.excluded.add(m.id);
    else g.state.excluded.delete(m.id);
    repairKeepers(g);
    update(g);
  });
  const select = el("select", { id: `part-${g.id}-${m.id}` });
  g.state.parts.forEach((_, q) => select.append(el("option", { value: String(q), selected: q === p, text: q === 0 ? `group ${g.id}` : `group ${partId(g, q)} (split off)` })));
  select.append(el("option", { value: "new", text: "a new group (split off)" }));
  select.addEventListener("change", () => {
    let q = select.value === "new" ? g.state.parts.push({ keeper: m.id, chosen: false, auto: true }) - 1 : Number(select.value);
    g.state.part[m.id] = q;
    repairKeepers(g);
    update(g, `#part-${g.id}-${m.id}`);
  });
  const facts = el(
    "dl",
    { class: "dup-facts" },
    el("dt", { text: m.id === g.keeper && p === 0 ? "score" : "score vs. suggested" }),
    el("dd", { class: "score", text: m.id === g.keeper ? "—" : formatScore(m.score) }),
    el("dt", { text: "pixels" }), el("dd", { text: `${m.width} × ${m.height}` }),
    el("dt", { text: "file size" }), el("dd", { text: formatSize(m.size) }),
    el("dt", { text: "file date" }), el("dd", { text: m.date }),
  );
  return el(
    "li",
    { class: `dup-member is-${words.key}`, dataset: { id: m.id } },
    el("a", { class: "dup-thumb", href: m.page, title: m.path },
      el("img", { src: m.thumbnail, alt: `Thumbnail of ${m.name}`, loading: "lazy", decoding: "async" })),
    el("p", { class: "dup-decision", text: words.text }),
    el("p", { class: "dup-name" }, breakable(m.name)),
    el("p", { class: "dup-folder path" }, breakable(m.folder)),
    facts,
    el("div", { class: "dup-controls" },
      el("span", { class: "dup-control" }, keep, el("label", { for: keep.id, text: "This one stays" })),
      el("span", { class: "dup-control" }, notCopy, el("label", { for: notCopy.id, text: "Not a copy" })),
      el("span", { class: "dup-control" }, el("label", { for: select.id, text: "Belongs to" }), select)),
  );
}

function groupItem(g) {
  const count = g.members.length;
  const heading = el("h2", { id: `group-${g.id}`, tabindex: "-1" },
    `Group ${g.id}`, el("span", { class: "dup-kind", text: ` · ${g.kind_words} · ${count} files` }));
  const parts = g.state.parts.map((_, p) => {
    const here = g.members.filter((m) => g.state.part[m.id] === p);
    if (p > 0 && here.length === 0) return null;
    const ordered = [...here].sort((a, b) => (b.id === g.state.parts[p].keeper) - (a.id === g.state.parts[p].keeper));
    return el("div", { class: "dup-part" },
      p > 0 ? el("h3", { text: `Group ${partId(g, p)}: split off from group ${g.id}` }) : null,
      el("ul", { class: "dup-members", "aria-label": `Files of group ${partId(g, p)}` }, ordered.map((m) => memberCard(g, m))));
  });
  return el("li", { class: "dup-group", dataset: { group: g.id } }, heading, parts);
}

function update(g, focusSelector = null) {
  const old = list.querySelector(`li.dup-group[data-group="${g.id}"]`);
  const active = document.activeElement && document.activeElement.id;
  const fresh = groupItem(g);
  old.replaceWith(fresh);
  const target = focusSelector ? fresh.querySelector(focusSelector) : active && document.getElementById(active);
  if (target) target.focus();
  summarise();
}

function decisions() {
  const out = [];
  for (const g of groups) {
    g.state.parts.forEach((part, p) => {
      const members = membersOf(g, p).map((m) => m.id);
      const excluded = g.members.filter((m) => g.state.part[m.id] === p && g.state.excluded.has(m.id)).map((m) => m.id);
      if (members.length === 0) return;
      out.push({ id: partId(g, p), kind: g.kind, keeper: part.keeper, members, excluded });
    });
  }
  return { layer: meta && meta.layer, groups: out };
}

function summarise() {
  const d = decisions();
  const moving = d.groups.reduce((n, g) => n + g.members.length - 1, 0);
  const excluded = d.groups.reduce((n, g) => n + g.excluded.length, 0);
  planSummary.textContent = groups.length
    ? `The plan covers the ${groups.length} groups shown on this page${total > groups.length ? ` (of ${total}; show more to include more)` : ""}: ${moving} files would move, ${excluded} marked not a copy.`
    : "No groups yet.";
}

async function load(append) {
  showMessage(errorLine, "");
  statusLine.textContent = append ? "Loading more groups…" : "Finding duplicate groups… On a large archive the first run takes a while (about half a minute for 100 000 images); the result is kept until the archive changes.";
  list.setAttribute("aria-busy", "true");
  try {
    const r = await api("/api/duplicates", { ...settings, offset: append ? groups.length : 0, limit: PAGE });
    meta = r;
    total = r.total;
    if (!append) {
      groups = [];
      list.replaceChildren();
    }
    for (const g of r.groups) {
      g.state = initialState(g);
      groups.push(g);
      list.append(groupItem(g));
    }
    const score = r.score === "normalised" ? "normalised score" : "cosine";
    statusLine.textContent = total
      ? `${total} groups (${r.counts.exact} of byte-identical files, ${r.counts.near} of look-alikes) holding ${r.counts.images_in_groups} of ${r.counts.images} images; layer ${r.layer}, ${score} ≥ ${r.threshold}${r.loose_threshold ? ` (or ≥ ${r.loose_threshold} against two members)` : ""}. Showing ${groups.length}.`
      : `No duplicate groups among ${r.counts.images} images (layer ${r.layer}, ${score} ≥ ${r.threshold}).`;
    moreButton.hidden = groups.length >= total;
    showRules(r);
    summarise();
    document.getElementById("dup-page").dataset.ready = "true";
  } catch (err) {
    statusLine.textContent = "";
    showMessage(errorLine, err.message);
  } finally {
    list.removeAttribute("aria-busy");
  }
}

function showRules(r) {
  const dl = document.getElementById("dup-rules-list");
  dl.replaceChildren();
  const rows = [["Same bytes", r.rules.exact], ["Look-alike groups", r.rules.near], ["Score", r.rules.score], ["File that stays", r.rules.keeper]];
  if (r.calibration) rows.push(["Default threshold", `${r.calibration.rule}. Data: ${r.calibration.data}.`]);
  rows.forEach(([k, v]) => dl.append(el("dt", { text: k }), el("dd", { text: v })));
  document.getElementById("dup-rules").hidden = false;
}

settingsForm.addEventListener("submit", (event) => {
  event.preventDefault();
  const data = new FormData(settingsForm);
  settings = { layer: data.get("layer"), threshold: data.get("threshold") };
  load(false);
});

moreButton.addEventListener("click", () => load(true));

planForm.addEventListener("submit", () => {
  document.getElementById("plan-decisions").value = JSON.stringify(decisions());
});

document.addEventListener("keydown", (event) => {
  if (event.ctrlKey || event.metaKey || event.altKey) return;
  // Keys typed into a field or a list stay there; on a radio button or a checkbox N and P still jump.
  const typing = "select, textarea, input:not([type=radio]):not([type=checkbox]):not([type=button])";
  if (event.target.closest && event.target.closest(typing)) return;
  const key = event.key.toLowerCase();
  if (key !== "n" && key !== "p") return;
  const headings = Array.from(list.querySelectorAll("li.dup-group > h2"));
  if (!headings.length) return;
  const current = headings.findIndex((h) => h.closest("li").contains(document.activeElement));
  const next = key === "n" ? Math.min(headings.length - 1, current + 1) : Math.max(0, current - 1);
  headings[next].focus();
  headings[next].scrollIntoView({ block: "start" });
  event.preventDefault();
});

load(false);
