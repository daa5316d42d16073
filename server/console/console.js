// The Credence console's script: fills index.html from the /v1 API of the
// server that sent the page (server/routes_console.cpp). Plain script, no
// library, no request to any other host. Data never goes into innerHTML:
// every text is set with textContent, so ids and names cannot inject markup.
"use strict";

(function () {
  const SVG_NS = "http://www.w3.org/2000/svg";
  const RANK_BY = [
    ["mean", "Expected rating"],
    ["lower", "Cautious (lower bound)"],
    ["upper", "Hopeful (upper bound)"],
    ["draw", "One posterior draw"],
  ];
  const LEVELS = ["0.5", "0.8", "0.9", "0.95"];
  const VISITOR_N = 8;
  const TABLE_N = 12;
  const SIMILAR_N = 6;

  // What the page has learnt from the API; one copy, read by every panel.
  const state = {
    token: null,              // the API token the user typed, memory only
    scale: { min: 1, max: 5 },
    products: [],             // every product the scatter shows
    names: new Map(),         // product id -> name (when the catalogue has one)
    visitorRatings: [],       // [{item, rating}] in the order given
    customerId: null,         // the customer whose list is shown
    loadedOnce: false,
  };

  const $ = (id) => document.getElementById(id);

  // ---- small DOM helpers

  function el(tag, attrs, ...children) {
    const node = document.createElement(tag);
    for (const [key, value] of Object.entries(attrs || {})) {
      if (value === undefined || value === null || value === false) continue;
      if (key === "className") node.className = value;
      else if (key === "text") node.textContent = value;
      else if (key.startsWith("on")) node.addEventListener(key.slice(2), value);
      else node.setAttribute(key, value === true ? "" : String(value));
    }
    for (const child of children) {
      if (child === undefined || child === null || child === false) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  function svg(tag, attrs) {
    const node = document.createElementNS(SVG_NS, tag);
    for (const [key, value] of Object.entries(attrs || {})) {
      if (key === "text") node.textContent = value;
      else node.setAttribute(key, String(value));
    }
    return node;
  }

  function isNumber(x) { return typeof x === "number" && Number.isFinite(x); }
  function fixed(x, digits) { return isNumber(x) ? x.toFixed(digits === undefined ? 2 : digits) : "–"; }
  function count(x) { return isNumber(x) ? x.toLocaleString("en") : "–"; }
  function percent(level) { return isNumber(level) ? `${Math.round(level * 1000) / 10}%` : "–"; }

  // The value at the first of `paths` ("a.b.c") present in `obj`, else
  // undefined, so a field an older server lacks shows as "–".
  function pick(obj, ...paths) {
    for (const path of paths) {
      let at = obj;
      for (const key of path.split(".")) {
        if (at === null || typeof at !== "object" || !(key in at)) { at = undefined; break; }
        at = at[key];
      }
      if (at !== undefined && at !== null) return at;
    }
    return undefined;
  }

  // "2026-12-03T23:47:31Z" -> "2026-12-03 23:47 UTC"; anything else as given.
  function shortDate(text) {
    const m = /^(\d{4}-\d{2}-\d{2})T(\d{2}:\d{2})(:\d{2}(\.\d+)?)?Z$/.exec(text);
    return m ? `${m[1]} ${m[2]} UTC` : text;
  }

  function productLabel(entry) {
    const name = entry.name || state.names.get(entry.item);
    return name ? name : entry.item;
  }

  function say(target, text, kind) {
    const node = typeof target === "string" ? $(target) : target;
    node.textContent = text || "";
    node.classList.toggle("is-error", kind === "error");
  }

  // ---- the API

  class ApiProblem extends Error {
    constructor(status, detail) {
      super(detail);
      this.status = status;
    }
  }

  // GET `path`, or POST `body` as JSON. Resolves to the parsed answer;
  // rejects with an ApiProblem carrying the problem's detail (RFC 9457).
  async function api(path, body) {
    const headers = { Accept: "application/json" };
    if (state.token) headers.Authorization = `Bearer ${state.token}`;
    const init = { method: "GET", headers, cache: "no-store", credentials: "same-origin" };
    if (body !== undefined) {
      init.method = "POST";
      headers["Content-Type"] = "application/json";
      init.body = JSON.stringify(body);
    }
    let res;
    try {
      res = await fetch(path, init);
    } catch (e) {
      throw new ApiProblem(0, "the server did not answer; is it still running?");
    }
    let doc = null;
    try { doc = await res.json(); } catch (e) { doc = null; }
    if (res.ok) return doc || {};
    const detail = (doc && (doc.detail || doc.title)) || `${res.status} ${res.statusText}`;
    if (res.status === 401) askForToken(state.token ? "That token was not accepted." : "This server asks for an API token.");
    throw new ApiProblem(res.status, detail);
  }

  function problemText(e, what) {
    if (!(e instanceof ApiProblem)) return `Could not show ${what}: ${e.message}`;
    if (e.status === 401) return `Showing ${what} needs an API token (above).`;
    if (e.status === 403) return `This token may not see ${what}: ${e.message}`;
    return `Could not show ${what}: ${e.message}`;
  }

  function askForToken(reason) {
    say("token-reason", reason);
    const form = $("token-form");
    if (form.hidden) {
      form.hidden = false;
      $("token-input").focus();
    }
  }

  // ---- the interval bar: the rating scale, the credible interval, the mean
  // and, when the order uses another number, that number.

  function position(value) {
    const { min, max } = state.scale;
    const clamped = Math.min(Math.max(value, min), max);  // drawing only; figures are printed as given
    return `${(4 + 92 * (clamped - min) / (max - min)).toFixed(2)}%`;
  }

  function scaleTicks() {
    const { min, max } = state.scale;
    const ticks = [];
    const step = max - min > 10 ? Math.ceil((max - min) / 10) : 1;
    for (let v = Math.ceil(min); v <= max + 1e-9; v += step) ticks.push(v);
    return ticks;
  }

  function intervalBar(entry, rankBy, level) {
    const bar = svg("svg", {
      class: "interval-bar", width: "100%", height: 26, role: "img",
      "aria-label": `expected ${fixed(entry.mean)}, ${percent(level)} interval ${fixed(entry.lower)} to ${fixed(entry.upper)}` +
        ` on the ${state.scale.min} to ${state.scale.max} scale`,
    });
    bar.append(svg("line", { class: "track", x1: position(state.scale.min), x2: position(state.scale.max), y1: 13, y2: 13 }));
    for (const v of scaleTicks()) bar.append(svg("line", { class: "tick", x1: position(v), x2: position(v), y1: 9, y2: 17 }));
    if (isNumber(entry.lower) && isNumber(entry.upper)) {
      const band = svg("rect", { class: "interval", x: position(entry.lower), y: 7, height: 12, rx: 6 });
      // Width as the difference of two percentages of the same axis.
      const { min, max } = state.scale;
      const lo = Math.min(Math.max(entry.lower, min), max), hi = Math.min(Math.max(entry.upper, min), max);
      band.setAttribute("width", `${(92 * (hi - lo) / (max - min)).toFixed(2)}%`);
      bar.append(band);
    }
    if (isNumber(entry.mean)) bar.append(svg("circle", { class: "mean", cx: position(entry.mean), cy: 13, r: 5 }));
    const used = rankValue(entry);
    if (rankBy !== "mean" && isNumber(used)) {
      bar.append(svg("line", { class: "rank-mark", x1: position(used), x2: position(used), y1: 2, y2: 24 }));
    }
    return bar;
  }

  function rankValue(entry) { return pick(entry, "rank_value"); }

  function drawAxis(container) {
    container.replaceChildren();
    const axis = svg("svg", { class: "axis", width: "100%", height: 16 });
    for (const v of scaleTicks()) {
      axis.append(svg("text", { x: position(v), y: 12, "text-anchor": "middle", text: String(v) }));
    }
    container.append(axis);
  }

  // ---- one recommended product

  function whyLine(entry, who) {
    const why = entry.why;
    if (!why || typeof why !== "object") return null;
    // The same words as `credence recommend` (cli/recommend_command.cpp).
    const parts = [];
    if (isNumber(why.rating_count)) {
      parts.push(`${count(why.rating_count)} rating${why.rating_count === 1 ? "" : "s"} in training`);
    }
    const near = Array.isArray(why.similar_rated) ? why.similar_rated : [];
    if (near.length > 0) {
      const list = near.map((s) => `${productLabel(s)} (${isNumber(s.rating) ? `rated ${s.rating}, ` : ""}` +
        `similarity ${fixed(s.similarity)})`);
      parts.push(`near what ${who} rated: ${list.join(", ")}`);
    }
    return parts.length ? el("p", { className: "why" }, el("span", { className: "why-label" }, "Why: "), parts.join("; ")) : null;
  }

  function recommendationRow(entry, answer, who) {
    const rankBy = answer.rank_by || "mean";
    const level = pick(answer, "level");
    const used = rankValue(entry);
    const figures = [`expected ${fixed(entry.mean)}`,
      `${percent(level)} interval ${fixed(entry.lower)}–${fixed(entry.upper)}`];
    if (rankBy !== "mean" && isNumber(used)) {
      // At the scale's end the API clips; the unclipped value orders the ties.
      const unclipped = entry.rank_value_unclipped;
      figures.push(`ranked on ${fixed(used)}` +
        (isNumber(unclipped) && fixed(unclipped) !== fixed(used) ? ` (${fixed(unclipped)} unclipped)` : ""));
    }
    const name = entry.name || state.names.get(entry.item);
    return el("li", { className: "rec" },
      el("div", { className: "rec-head" },
        el("span", { className: "rec-name" }, name || entry.item),
        name ? el("span", { className: "rec-id" }, entry.item) : null,
        entry.category ? el("span", { className: "rec-category" }, entry.category) : null),
      intervalBar(entry, rankBy, level),
      el("p", { className: "rec-figures" }, figures.join(" · ")),
      whyLine(entry, who));
  }

  function orderNote(answer) {
    const rankBy = answer.rank_by || "mean";
    const notes = {
      mean: "Ordered by expected rating.",
      lower: "Ordered by the interval's lower bound: sure bets first.",
      upper: "Ordered by the interval's upper bound: what might delight first.",
      draw: `Ordered by one draw from the posterior${answer.seed ? ` (seed ${answer.seed})` : ""}: ask again for another.`,
    };
    return notes[rankBy] || `Ordered by ${rankBy}.`;
  }

  function showList(listId, axisId, answer, who) {
    const list = $(listId);
    const items = Array.isArray(answer.items) ? answer.items : [];
    drawAxis($(axisId));
    list.replaceChildren(...items.map((entry) => recommendationRow(entry, answer, who)));
    return items.length;
  }

  // rank_by and level selects for a panel, and a category select when
  // `withCategory` (filled once the catalogue is known); `refresh` runs on
  // every change. Returns a function that reads the current choices.
  function buildSwitches(prefix, refresh, withCategory) {
    const container = $(`${prefix}-switches`);
    const rankBy = el("select", { id: `${prefix}-rank-by`, onchange: refresh },
      ...RANK_BY.map(([value, label]) => el("option", { value }, label)));
    const level = el("select", { id: `${prefix}-level`, onchange: refresh },
      ...LEVELS.map((value) => el("option", { value, selected: value === "0.9" }, percent(Number(value)))));
    container.append(
      el("div", { className: "field" }, el("label", { for: rankBy.id }, "Order by"), rankBy),
      el("div", { className: "field" }, el("label", { for: level.id }, "Interval"), level));
    let category = null;
    if (withCategory) {
      category = el("select", { id: `${prefix}-category`, onchange: refresh }, el("option", { value: "" }, "All"));
      container.append(el("div", { className: "field", hidden: true, "data-category-field": "" },
        el("label", { for: category.id }, "Category"), category));
    }
    return () => ({ rank_by: rankBy.value, level: Number(level.value), category: category ? category.value : "" });
  }

  // Fills every category select (products panel and panels' switches).
  function fillCategories(categories) {
    for (const select of [$("product-category"), $("customer-category")]) {
      if (!select) continue;
      select.replaceChildren(el("option", { value: "" }, "All"), ...categories.map((c) => el("option", { value: c }, c)));
      select.closest(".field").hidden = categories.length === 0;
    }
  }

  // ---- the model at a glance

  function showModel(m) {
    const customers = pick(m, "data.customers");
    const products = pick(m, "data.products");
    const ratings = pick(m, "data.ratings");
    const fitted = pick(m, "fit.created_at");
    const noiseSd = pick(m, "noise.sd_posterior_mean", "noise.sd");
    const facts = [
      ["Customers", count(customers)],
      ["Products", count(products)],
      ["Ratings", count(ratings)],
      ["Rank", count(m.rank)],
      ["Chains", count(m.chains)],
      ["Samples kept", count(m.samples)],
      ["Noise sd", fixed(noiseSd)],
      ["Fitted", fitted ? shortDate(String(fitted)) : "–"],
    ];
    $("glance-facts").replaceChildren(...facts.flatMap(([term, value]) =>
      [el("div", { className: "fact" }, el("dt", {}, term), el("dd", {}, value))]));
    const scale = pick(m, "scale");
    if (scale && isNumber(scale.min) && isNumber(scale.max) && scale.max > scale.min) {
      state.scale = { min: scale.min, max: scale.max };
    }
    $("model-tag").textContent = m.model ? `model ${m.model}` : "";
    showVerdict(m);
    showHeldOut(m);
  }

  function worstQuantities(m) {
    const given = pick(m, "convergence.worst");
    return Array.isArray(given) ? given.slice(0, 3) : [];
  }

  function showVerdict(m) {
    const box = $("glance-verdict");
    const verdict = pick(m, "convergence.verdict");
    const words = {
      converged: ["good", "The chains agree: converged."],
      not_converged: ["bad", "The chains disagree: not converged; treat the figures with care."],
      not_assessable: ["unknown", "Too few draws to judge convergence."],
    };
    const [tone, sentence] = words[verdict] || ["unknown", verdict ? `Convergence: ${verdict}.` : "No convergence verdict stored."];
    const rows = worstQuantities(m).map((q) => {
      const ess = pick(q, "ess_bulk");
      return el("li", {}, `${q.quantity || "quantity"}: R-hat ${fixed(pick(q, "r_hat"), 3)}`,
        isNumber(ess) ? `, bulk ESS ${fixed(ess, 0)}` : "");
    });
    box.replaceChildren(
      el("p", { className: `verdict-line tone-${tone}` }, sentence),
      rows.length ? el("p", { className: "small" }, "Worst quantities:") : null,
      rows.length ? el("ul", { className: "worst" }, ...rows) : null);
  }

  // The held-out ratings (validation in GET /v1/model; null when the fit had
  // none): accuracy figures, then calibration: how often each nominal
  // interval held the held-out rating (a calibrated model: about as often as
  // it says).
  function showHeldOut(m) {
    const box = $("glance-heldout");
    const held = pick(m, "validation");
    if (!held || typeof held !== "object") { box.replaceChildren(); return; }
    const facts = [
      ["Held-out ratings", count(held.ratings)],
      ["RMSE", fixed(held.rmse, 3)],
      ["MAE", fixed(held.mae, 3)],
      ["Mean log predictive density", fixed(held.mean_log_predictive_density, 3)],
    ].filter(([, v]) => v !== "–");
    const coverage = held.coverage && typeof held.coverage === "object" ? Object.entries(held.coverage)
      .map(([level, share]) => [Number(level), share]).filter(([l, s]) => isNumber(l) && isNumber(s))
      .sort((a, b) => a[0] - b[0]) : [];
    const rows = coverage.map(([level, share]) => {
      const bar = svg("svg", { class: "coverage-bar", width: "100%", height: 14, "aria-hidden": "true" });
      bar.append(svg("rect", { class: "coverage-track", x: 0, y: 3, width: "100%", height: 8, rx: 4 }));
      bar.append(svg("rect", { class: "coverage-fill", x: 0, y: 3, width: `${(100 * share).toFixed(1)}%`, height: 8, rx: 4 }));
      bar.append(svg("line", { class: "coverage-nominal", x1: `${100 * level}%`, x2: `${100 * level}%`, y1: 0, y2: 14 }));
      return el("li", {}, el("span", { className: "coverage-text" },
        `${percent(level)} intervals caught ${percent(share)}`), bar);
    });
    box.replaceChildren(el("h3", {}, "On the held-out ratings"),
      el("dl", { className: "facts facts-small" },
        ...facts.map(([t, v]) => el("div", { className: "fact" }, el("dt", {}, t), el("dd", {}, v)))),
      rows.length ? el("p", { className: "small" }, "Calibration (the mark is where a calibrated model would be):") : null,
      rows.length ? el("ul", { className: "coverage" }, ...rows) : null);
  }

  // ---- a customer's list

  let customerSwitches = null;
  let customerRequest = 0;

  async function refreshCustomer() {
    if (!state.customerId) return;
    const ticket = ++customerRequest;
    const { rank_by, level, category } = customerSwitches();
    const query = new URLSearchParams({ n: $("customer-n").value, rank_by, level: String(level) });
    if (category) query.set("category", category);
    say("customer-status", "Asking the model…");
    $("customer-list").setAttribute("aria-busy", "true");
    try {
      const answer = await api(`/v1/users/${encodeURIComponent(state.customerId)}/recommendations?${query}`);
      if (ticket !== customerRequest) return;  // a newer request is on its way
      const shown = showList("customer-list", "customer-axis", answer, "they");
      $("customer-list").removeAttribute("aria-busy");
      say("customer-status", `${shown} products${category ? ` in ${category}` : ""} for this customer. ${orderNote(answer)}`);
    } catch (e) {
      if (ticket !== customerRequest) return;
      $("customer-list").replaceChildren();
      $("customer-list").removeAttribute("aria-busy");
      say("customer-status", problemText(e, "this customer's list"), "error");
    }
  }

  // ---- a new visitor

  let visitorSwitches = null;
  let visitorRequest = 0;

  function showVisitorRatings() {
    const list = $("visitor-rated");
    list.replaceChildren(...state.visitorRatings.map((r, k) => {
      const name = state.names.get(r.item) || r.item;
      return el("li", {},
        el("span", { className: "rated-name" }, name),
        el("span", { className: "stars", "aria-label": `${r.rating} stars` }, starText(r.rating)),
        el("button", {
          type: "button", className: "quiet", "aria-label": `Remove the rating of ${name}`,
          onclick: () => { state.visitorRatings.splice(k, 1); showVisitorRatings(); refreshVisitor(); },
        }, "Remove"));
    }));
    if (state.visitorRatings.length === 0) list.append(el("li", { className: "empty" }, "No ratings yet."));
  }

  function starText(rating) {
    const { min, max } = state.scale;
    if (max - min > 9) return String(rating);
    const full = Math.round(rating - min + 1), all = Math.round(max - min + 1);
    return "★".repeat(full) + "☆".repeat(Math.max(0, all - full));
  }

  async function refreshVisitor() {
    const ticket = ++visitorRequest;
    const { rank_by, level } = visitorSwitches();
    const body = { ratings: state.visitorRatings, n: VISITOR_N, rank_by, level };
    say("visitor-status", "Asking the model…");
    $("visitor-list").setAttribute("aria-busy", "true");
    try {
      const answer = await api("/v1/recommendations", body);
      if (ticket !== visitorRequest) return;
      const shown = showList("visitor-list", "visitor-axis", answer, "you");
      $("visitor-list").removeAttribute("aria-busy");
      const basis = state.visitorRatings.length === 0
        ? "With no ratings yet, this is what the model expects of anyone."
        : `From ${state.visitorRatings.length} rating${state.visitorRatings.length === 1 ? "" : "s"}.`;
      say("visitor-status", `${shown} products. ${basis} ${orderNote(answer)}`);
    } catch (e) {
      if (ticket !== visitorRequest) return;
      $("visitor-list").replaceChildren();
      $("visitor-list").removeAttribute("aria-busy");
      say("visitor-status", problemText(e, "the visitor's list"), "error");
    }
  }

  function fillVisitorChoices() {
    const select = $("visitor-product");
    const byCategory = new Map();
    const sorted = [...state.products].sort((a, b) => productLabel(a).localeCompare(productLabel(b)));
    for (const p of sorted) {
      const key = p.category || "";
      if (!byCategory.has(key)) byCategory.set(key, []);
      byCategory.get(key).push(p);
    }
    const option = (p) => el("option", { value: p.item }, p.name ? `${p.name} (${p.item})` : p.item);
    const groups = [...byCategory.keys()].sort();
    select.replaceChildren(...(groups.length === 1 && groups[0] === ""
      ? sorted.map(option)
      : groups.map((g) => el("optgroup", { label: g || "Other" }, ...byCategory.get(g).map(option)))));
    const stars = $("visitor-stars");
    const values = [];
    for (let v = Math.ceil(state.scale.max); v >= state.scale.min; v -= 1) values.push(v);
    stars.replaceChildren(...values.map((v) => el("option", { value: v }, `${starText(v)} ${v}`)));
  }

  function addVisitorRating(event) {
    event.preventDefault();
    const item = $("visitor-product").value;
    const rating = Number($("visitor-stars").value);
    if (!item || !isNumber(rating)) return;
    const existing = state.visitorRatings.find((r) => r.item === item);
    if (existing) existing.rating = rating;  // a product is rated once: the new stars replace the old
    else state.visitorRatings.push({ item, rating });
    showVisitorRatings();
    refreshVisitor();
  }

  // ---- products

  let productRequest = 0;

  async function loadProducts(model) {
    const products = pick(model, "data.products");
    const n = Math.max(1, Math.min(isNumber(products) ? products : 1000, 1000));
    const answer = await api(`/v1/items?order=popularity&n=${n}`);
    state.products = Array.isArray(answer.items) ? answer.items : [];
    for (const p of state.products) if (p.name) state.names.set(p.item, p.name);
    fillCategories([...new Set(state.products.map((p) => p.category).filter(Boolean))].sort());
    drawScatter();
    fillVisitorChoices();
  }

  async function refreshProductTable() {
    const ticket = ++productRequest;
    const order = $("product-order").value;
    const category = $("product-category").value;
    const query = new URLSearchParams({ order, n: String(TABLE_N) });
    if (category) query.set("category", category);
    try {
      const answer = await api(`/v1/items?${query}`);
      if (ticket !== productRequest) return;
      const items = Array.isArray(answer.items) ? answer.items : [];
      const captions = {
        uncertainty: "least certain first", popularity: "most rated first", mean: "highest expected rating first",
      };
      $("product-caption").textContent = `${items.length} products, ${captions[order] || order}` +
        (category ? `, in ${category}` : "");
      $("product-table").tBodies[0].replaceChildren(...items.map((p) => el("tr", {},
        el("th", { scope: "row" },
          el("button", {
            type: "button", className: "name-button", title: `Products like ${productLabel(p)}`,
            onclick: () => showSimilar(p),
          }, productLabel(p)),
          p.name ? el("span", { className: "cell-id" }, p.item) : null),
        el("td", { className: "col-category" }, p.category || ""),
        el("td", { className: "num" }, count(p.rating_count)),
        el("td", { className: "num" }, fixed(p.mean)),
        el("td", { className: "num" }, fixed(p.sd)))));
      say("product-status", "");
    } catch (e) {
      if (ticket !== productRequest) return;
      say("product-status", problemText(e, "the products"), "error");
    }
  }

  async function showSimilar(product) {
    const box = $("similar");
    box.replaceChildren(el("p", { className: "status" }, `Looking for products like ${productLabel(product)}…`));
    try {
      const answer = await api(`/v1/items/${encodeURIComponent(product.item)}/similar?n=${SIMILAR_N}`);
      const items = Array.isArray(answer.items) ? answer.items : [];
      box.replaceChildren(
        el("h3", {}, `Closest to ${productLabel(product)}`),
        el("p", { className: "small" }, "Similarity: cosine of the products' factors, averaged over the posterior samples."),
        el("ol", { className: "similar-list" }, ...items.map((s) => el("li", {},
          el("span", { className: "similar-name" }, productLabel(s)),
          s.category ? el("span", { className: "rec-category" }, s.category) : null,
          el("span", { className: "similar-score" },
            similarityBar(s.similarity), el("span", { className: "similar-figure" }, fixed(s.similarity)))))));
    } catch (e) {
      box.replaceChildren(el("p", { className: "status is-error" }, problemText(e, "similar products")));
    }
  }

  function similarityBar(similarity) {
    const bar = svg("svg", { class: "similarity-bar", width: 80, height: 10, "aria-hidden": "true" });
    bar.append(svg("rect", { class: "similarity-track", x: 0, y: 2, width: 80, height: 6, rx: 3 }));
    if (isNumber(similarity)) {
      bar.append(svg("rect", { class: "similarity-fill", x: 0, y: 2, width: (80 * Math.max(0, similarity)).toFixed(1), height: 6, rx: 3 }));
    }
    return bar;
  }

  // The scatter: predictive sd (y) against rating count (x, log scale as
  // counts span orders of magnitude), one focusable point per product.
  function drawScatter() {
    const box = $("scatter");
    const points = state.products.filter((p) => isNumber(p.sd) && isNumber(p.rating_count));
    // Drawn at the width it is shown, so text keeps its size on any screen.
    const W = Math.max(280, Math.round(box.clientWidth || 640));
    const H = Math.round(W < 520 ? W * 0.8 : Math.min(400, W * 0.62));
    const left = 52, right = 16, top = 14, bottom = 40;
    const plot = svg("svg", {
      viewBox: `0 0 ${W} ${H}`, class: "scatter-plot", role: "group",
      "aria-label": `Predictive standard deviation against rating count for ${points.length} products`,
    });
    if (points.length === 0) { box.replaceChildren(plot); return; }
    const maxCount = Math.max(1, ...points.map((p) => p.rating_count));
    const sds = points.map((p) => p.sd);
    const sdLow = Math.min(...sds), sdHigh = Math.max(...sds);
    const pad = (sdHigh - sdLow) * 0.08 || 0.1;
    const y0 = Math.max(0, sdLow - pad), y1 = sdHigh + pad;
    const x = (c) => left + (W - left - right) * Math.log10(1 + c) / Math.log10(1 + maxCount);
    const y = (s) => top + (H - top - bottom) * (1 - (s - y0) / (y1 - y0));

    for (let decade = 1; decade <= maxCount * 1.0001; decade *= 10) {
      plot.append(svg("line", { class: "grid", x1: x(decade), x2: x(decade), y1: top, y2: H - bottom }));
      plot.append(svg("text", { class: "axis-label", x: x(decade), y: H - bottom + 16, "text-anchor": "middle", text: count(decade) }));
    }
    plot.append(svg("text", { class: "axis-label", x: x(0), y: H - bottom + 16, "text-anchor": "middle", text: "0" }));
    for (let k = 0; k <= 4; k += 1) {
      const v = y0 + (y1 - y0) * k / 4;
      plot.append(svg("line", { class: "grid", x1: left, x2: W - right, y1: y(v), y2: y(v) }));
      plot.append(svg("text", { class: "axis-label", x: left - 6, y: y(v) + 4, "text-anchor": "end", text: v.toFixed(2) }));
    }
    plot.append(svg("text", { class: "axis-title", x: (left + W - right) / 2, y: H - 6, "text-anchor": "middle", text: "ratings (log scale)" }));
    plot.append(svg("text", { class: "axis-title", x: 14, y: (top + H - bottom) / 2, "text-anchor": "middle",
      transform: `rotate(-90 14 ${(top + H - bottom) / 2})`, text: "predictive sd" }));

    const label = svg("text", { class: "point-label", x: 0, y: 0 });
    const show = (p, cx, cy) => {
      label.textContent = `${productLabel(p)}: sd ${fixed(p.sd)}, ${count(p.rating_count)} ratings`;
      const onRight = cx < W * 0.55;
      label.setAttribute("x", onRight ? cx + 9 : cx - 9);
      label.setAttribute("y", Math.max(top + 10, cy - 8));
      label.setAttribute("text-anchor", onRight ? "start" : "end");
      $("scatter-caption").textContent = label.textContent;
    };
    // One tab stop for the whole plot: the arrow keys move between points
    // from fewest to most ratings, Home and End jump to the ends.
    const ordered = [...points].sort((a, b) => a.rating_count - b.rating_count || a.sd - b.sd);
    const dots = [];
    const moveTo = (k) => {
      const next = dots[Math.max(0, Math.min(dots.length - 1, k))];
      for (const d of dots) d.setAttribute("tabindex", d === next ? "0" : "-1");
      next.focus();
    };
    const keys = { ArrowRight: 1, ArrowUp: 1, ArrowLeft: -1, ArrowDown: -1 };
    ordered.forEach((p, k) => {
      const cx = x(p.rating_count), cy = y(p.sd);
      const dot = svg("circle", {
        class: "point", cx: cx.toFixed(1), cy: cy.toFixed(1), r: 4.5, tabindex: k === 0 ? 0 : -1, role: "button",
        "aria-label": `${productLabel(p)}: predictive sd ${fixed(p.sd)}, ${count(p.rating_count)} ratings`,
      });
      dot.append(svg("title", { text: `${productLabel(p)} (${p.item})` }));
      dot.addEventListener("mouseenter", () => show(p, cx, cy));
      dot.addEventListener("focus", () => show(p, cx, cy));
      dot.addEventListener("click", () => showSimilar(p));
      dot.addEventListener("keydown", (event) => {
        if (event.key === "Enter" || event.key === " ") { event.preventDefault(); showSimilar(p); }
        else if (event.key in keys) { event.preventDefault(); moveTo(k + keys[event.key]); }
        else if (event.key === "Home") { event.preventDefault(); moveTo(0); }
        else if (event.key === "End") { event.preventDefault(); moveTo(dots.length - 1); }
      });
      dots.push(dot);
      plot.append(dot);
    });
    plot.append(label);
    box.replaceChildren(plot);
  }

  // ---- start

  async function loadAll() {
    say("notice", "");
    let model;
    try {
      model = await api("/v1/model");
      showModel(model);
    } catch (e) {
      say("notice", problemText(e, "the model"), "error");
      return;
    }
    try {
      await loadProducts(model);
    } catch (e) {
      say("product-status", problemText(e, "the products"), "error");
    }
    showVisitorRatings();
    await Promise.all([refreshProductTable(), refreshVisitor(), refreshCustomer()]);
    state.loadedOnce = true;
    document.body.dataset.ready = "true";
  }

  function start() {
    customerSwitches = buildSwitches("customer", refreshCustomer, true);
    visitorSwitches = buildSwitches("visitor", refreshVisitor);
    $("customer-form").addEventListener("submit", (event) => {
      event.preventDefault();
      const id = $("customer-id").value.trim();
      if (!id) return;
      state.customerId = id;
      refreshCustomer();
    });
    $("customer-n").addEventListener("change", refreshCustomer);
    $("visitor-form").addEventListener("submit", addVisitorRating);
    $("product-order").addEventListener("change", refreshProductTable);
    $("product-category").addEventListener("change", refreshProductTable);
    $("product-form").addEventListener("submit", (event) => event.preventDefault());
    $("token-form").addEventListener("submit", (event) => {
      event.preventDefault();
      state.token = $("token-input").value.trim() || null;
      $("token-input").value = "";
      $("token-form").hidden = true;
      loadAll();
    });
    let resizeTimer = 0;
    window.addEventListener("resize", () => {
      clearTimeout(resizeTimer);
      resizeTimer = setTimeout(drawScatter, 150);
    });
    loadAll();
  }

  if (document.readyState === "loading") document.addEventListener("DOMContentLoaded", start);
  else start();
})();
