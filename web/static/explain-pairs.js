// Region pairs of the "why it matched" view: the list, and stepping through it with buttons or keys.
import { el, formatPercent, whereIs } from "./common.js";

/** A share as a percentage; below zero said plainly. */
export function signedPercent(fraction) {
  return fraction < 0 ? `minus ${formatPercent(-fraction)}` : formatPercent(fraction);
}

/** Where the pairs come from and the placement they agree on, in plain words. */
function placementText(data) {
  const pl = data.pair_layer;
  const source = pl.name === data.layer
    ? `Pairs are found on the ${pl.name} layer, like the score.`
    : `Pairs are found on the ${pl.name} layer (a finer grid, ${pl.grid[0]} by ${pl.grid[1]} cells); the score comes from the ${data.layer} layer.`;
  if (!data.pairs.length) return source;
  const how = [];
  if (pl.mirrored) how.push("mirrored (left and right swapped)");
  if (pl.scale < 0.9) how.push(`with the whole query spanning about ${Math.round(pl.scale * 100)}% of the match's width`);
  else if (pl.scale > 1.1) how.push(`with the whole match spanning about ${Math.round(100 / pl.scale)}% of the query's width`);
  else how.push("at about the same size");
  return `${source} ${pl.agreeing} of ${pl.candidates} candidate links agree on one placement: the match shows the query's content ${how.join(", ")}.`;
}

/** The region pairs, with a stepper: Previous / Next buttons, arrow keys on the list, Home and End.
    Returns {section, quick}: `quick` (null without pairs) is a small stepper for the row above the two
    images, so that pairs can be stepped through with both images in view (the section lies below them). */
export function pairSection(data, pairs, what, highlight) {
  const list = el("ol", { class: "pair-list", id: "pair-list", "aria-label": "Region pairs, in the order the geometric check ranks them" });
  const position = el("span", { class: "pair-position", id: "pair-position", role: "status", "aria-live": "polite" });
  const quickPosition = el("span", { class: "pair-quick-position", id: "pair-quick-position" });
  const items = [];
  let current = null; // index into pairs, or null for all
  const select = (index, focus) => {
    current = index;
    items.forEach((item, i) => item.classList.toggle("is-active", i === index));
    highlight(index === null ? null : pairs[index].n);
    if (index === null) {
      position.textContent = `All ${pairs.length} pairs shown`;
      quickPosition.textContent = `all ${pairs.length}`;
    } else {
      const p = pairs[index];
      position.textContent = `Pair ${p.n} of ${pairs.length}: query ${whereIs(p.query)} \u2194 match ${whereIs(p.match)}`;
      quickPosition.textContent = `${p.n} of ${pairs.length}`;
      if (focus) items[index].focus();
    }
  };
  const step = (delta, focus = true) => {
    if (!pairs.length) return;
    const next = current === null ? (delta > 0 ? 0 : pairs.length - 1) : (current + delta + pairs.length) % pairs.length;
    select(next, focus);
  };
  pairs.forEach((p, i) => {
    const item = el(
      "li",
      { tabindex: "0", class: "pair", dataset: { n: p.n } },
      el("span", { class: "pair-chip", text: String(p.n) }),
      el("span", { class: "pair-text" }, `query ${whereIs(p.query)} \u2194 match ${whereIs(p.match)}`,
        el("span", { class: "pair-share", title: `The two regions hold this part of ${what}; their local features are alike to ${p.similarity.toFixed(2)} (cosine).` },
          `features alike ${p.similarity.toFixed(2)} \u00b7 holds ${signedPercent(p.share)} of it`)),
    );
    item.querySelector(".pair-chip").style.backgroundColor = p.colour;
    item.addEventListener("mouseenter", () => highlight(p.n));
    item.addEventListener("mouseleave", () => highlight(current === null ? null : pairs[current].n));
    item.addEventListener("focus", () => { if (current !== i) select(i, false); });
    item.addEventListener("click", () => select(current === i ? null : i, false));
    items.push(item);
    list.append(item);
  });
  list.addEventListener("keydown", (e) => {
    const keys = { ArrowDown: 1, ArrowRight: 1, ArrowUp: -1, ArrowLeft: -1 };
    if (e.key in keys) {
      e.preventDefault();
      step(keys[e.key]);
    } else if (e.key === "Home" || e.key === "End") {
      e.preventDefault();
      select(e.key === "Home" ? 0 : pairs.length - 1, true);
    }
  });
  const section = el(
    "section",
    { class: "explain-section", "aria-labelledby": "pairs-heading" },
    el("h3", { id: "pairs-heading", text: "Regions that show the same content" }),
    el("p", { class: "fine", text: "Each pair links a small region of the query with the region of the match whose local features are most alike, " +
      "both ways round, and is kept only when it agrees with the one placement of the query in the match that most links agree on. " +
      "No pair is offered for two regions on the frame's edge. " + placementText(data) +
      ` Each row says how alike the two regions' features are (1.00 = the same) and what part of ${what} the two regions hold.` }),
  );
  if (!pairs.length) {
    section.append(el("p", { text: "No regions agree on one placement: the two images may share a look (colours, texture) without showing the same thing." }));
    return { section, quick: null };
  }
  const stepper = el(
    "div",
    { class: "pair-stepper" },
    el("button", { type: "button", class: "button button-small", id: "pair-prev", onclick: () => step(-1) }, "\u2190 Previous pair"),
    el("button", { type: "button", class: "button button-small", id: "pair-next", onclick: () => step(1) }, "Next pair \u2192"),
    el("button", { type: "button", class: "button button-small", id: "pair-all", onclick: () => select(null, false) }, "Show all"),
    position,
  );
  section.append(stepper, el("p", { class: "fine", text: "On the list, the arrow keys step from pair to pair." }), list);
  // The quick stepper keeps focus on its own buttons: the page does not scroll to the list below.
  const quick = el(
    "span",
    { class: "pair-quick", role: "group", "aria-label": "Step through the linked regions" },
    "Linked region",
    el("button", { type: "button", class: "button button-small", id: "pair-prev-top", "aria-label": "Previous linked region",
      onclick: () => step(-1, false) }, "\u2190"),
    quickPosition,
    el("button", { type: "button", class: "button button-small", id: "pair-next-top", "aria-label": "Next linked region",
      onclick: () => step(1, false) }, "\u2192"),
  );
  select(null, false);
  return { section, quick };
}
