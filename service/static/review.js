// nearsight review page: judge the pairs that count most, browse duplicate groups, compare pairs,
// mark same / different, search.
// Plain JavaScript, no build step. Every piece of data comes from the JSON API under /v1.
"use strict";

(function () {
  const $ = (id) => document.getElementById(id);
  const PAGE_SIZE = 24;
  const KEY_STORE = "nearsight-api-key";
  const state = {
    key: sessionStorage.getItem(KEY_STORE) || "",
    page: 0,
    tier: "",
    minSize: 2,
    group: null,       // the group being reviewed (from GET /v1/groups/<gid>)
    pairs: [],         // [keeper, member] pairs of that group
    pairIndex: 0,
    retry: null,       // what to do again once a key is given
    judge: { pairs: [], index: 0, page: null },  // the pairs to judge (GET /v1/review/pairs), one page
  };

  // -- talking to the API ------------------------------------------------------------------
  function headers(extra) {
    const h = Object.assign({}, extra || {});
    if (state.key) h["Authorization"] = "Bearer " + state.key;
    return h;
  }

  async function api(path, options) {
    options = options || {};
    const response = await fetch(path, Object.assign({}, options, { headers: headers(options.headers) }));
    let body = null;
    try { body = await response.json(); } catch (e) { body = null; }
    if (!response.ok) {
      const message = (body && body.message) || ("HTTP " + response.status);
      const error = new Error(message);
      error.status = response.status;
      if (response.status === 401 || response.status === 403) askForKey(message);
      throw error;
    }
    return body;
  }

  // Thumbnails: a plain <img src> when no key is needed; with a key, fetched with it and shown as a blob.
  function showImage(img, url, alt) {
    img.alt = alt || "";
    img.decoding = "async";
    if (!state.key) { img.loading = "lazy"; img.src = url; return; }
    fetch(url, { headers: headers() })
      .then((r) => (r.ok ? r.blob() : Promise.reject(new Error("HTTP " + r.status))))
      .then((blob) => { img.src = URL.createObjectURL(blob); })
      .catch(() => { img.alt = (alt || "image") + " (could not be loaded)"; });
  }

  function thumb(id) { return "/v1/images/" + encodeURIComponent(id) + "/thumbnail"; }
  function preview(id) { return "/v1/images/" + encodeURIComponent(id) + "/preview?side=1600"; }

  function askForKey(why) {
    $("key-why").textContent = why;
    $("key-form").hidden = false;
    $("key-input").focus();
  }

  $("key-form").addEventListener("submit", (event) => {
    event.preventDefault();
    state.key = $("key-input").value.trim();
    sessionStorage.setItem(KEY_STORE, state.key);
    $("key-form").hidden = true;
    toast("Key saved for this tab.");
    const again = state.retry;
    state.retry = null;
    if (again) again(); else route();
  });

  // -- small helpers -----------------------------------------------------------------------
  let toastTimer = null;
  function toast(text, isError) {
    const el = $("toast");
    el.textContent = text;
    el.classList.toggle("error", !!isError);
    el.classList.add("show");
    clearTimeout(toastTimer);
    toastTimer = setTimeout(() => el.classList.remove("show"), 4000);
  }

  function el(tag, attrs, children) {
    const node = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (k === "text") node.textContent = v;
      else if (k === "class") node.className = v;
      else node.setAttribute(k, v);
    }
    for (const child of children || []) node.append(child);
    return node;
  }

  function basename(path) { return (path || "").split(/[\\/]/).pop(); }
  function bytes(n) {
    if (n == null) return "";
    const units = ["B", "KiB", "MiB", "GiB"];  // binary units, as the CLI and the reports write them
    let i = 0;
    while (n >= 1024 && i < units.length - 1) { n /= 1024; i++; }
    return (i ? n.toFixed(1) : n) + " " + units[i];
  }
  function tierName(t) {
    return { "same-bytes": "same bytes", "same-pixels": "same pixels", "person-same": "marked same" }[t] || t;
  }

  function showView(name) {
    for (const view of document.querySelectorAll(".view")) view.hidden = view.id !== "view-" + name;
    for (const [link, views] of [["nav-judge", ["judge"]], ["nav-groups", ["groups", "group", "pair"]],
                                 ["nav-search", ["search"]]]) {
      if (views.includes(name)) $(link).setAttribute("aria-current", "page");
      else $(link).removeAttribute("aria-current");
    }
    const heading = document.querySelector("#view-" + name + " h1");
    if (heading) heading.focus({ preventScroll: false });
  }

  // -- status line ---------------------------------------------------------------------------
  async function loadStatus() {
    try {
      const s = await api("/v1/status");
      const gen = s.generation;
      $("status-line").textContent = gen
        ? `${s.ok} images · ${gen.groups} groups · generation ${gen.name}`
        : `${s.ok} images · no index yet`;
    } catch (e) {
      $("status-line").textContent = "Status unavailable: " + e.message;
    }
  }

  // -- the pairs to judge first ----------------------------------------------------------------
  // The server orders them (indexer/calibration/review_queue.py): near the duplicate threshold, the estimated
  // chance of "same" nearest even first. A judged pair leaves the queue, so a new page starts at 0.
  const SOURCE_WORDS = { verdicts: "your verdicts so far", calibration: "the calibration" };

  async function loadJudgePage() {
    const page = await api("/v1/review/pairs?" + new URLSearchParams({ limit: PAGE_SIZE, offset: 0 }));
    state.judge = { pairs: page.pairs, index: 0, page: page };
  }

  async function renderJudge() {
    showView("judge");
    $("judge-summary").textContent = "Loading the pairs to judge…";
    try {
      await loadJudgePage();  // afresh each time: verdicts given in a group leave the queue too
    } catch (e) {
      $("judge-summary").textContent = e.message;
      state.retry = renderJudge;
      return;
    }
    showJudgePair();
  }

  function fileCaption(f) {
    return `#${f.id} · ${f.width}×${f.height} · ${bytes(f.file_size)} · ${f.path}`;
  }

  function showJudgePair() {
    const { pairs, page } = state.judge;
    const source = SOURCE_WORDS[page.probability_from];
    $("judge-summary").textContent = page.total
      ? `${page.total} pairs near the duplicate threshold ${page.threshold.toFixed(3)} have no verdict yet. ` +
        (source ? `First come those whose chance of being the same picture, as estimated from ${source}, ` +
                  "is nearest even: your verdict counts most there."
                : "No calibration yet: the pairs nearest the threshold come first.")
      : "No pair near the duplicate threshold is left to judge.";
    $("judge-current").hidden = !pairs.length;
    renderJudgeList();
    if (!pairs.length) return;
    const index = state.judge.index = Math.min(Math.max(0, state.judge.index), pairs.length - 1);
    const pair = pairs[index];
    $("judge-state").textContent = `Pair ${index + 1} of ${pairs.length} on this page: ${pair.why}.`;
    showImage($("judge-img-a"), preview(pair.a.id), "first: " + basename(pair.a.path));
    showImage($("judge-img-b"), preview(pair.b.id), "second: " + basename(pair.b.path));
    $("judge-cap-a").textContent = fileCaption(pair.a);
    $("judge-cap-b").textContent = fileCaption(pair.b);
    $("judge-prev").disabled = index === 0;
    $("judge-next").disabled = index + 1 >= pairs.length;
  }

  function renderJudgeList() {
    const list = $("judge-list");
    list.replaceChildren();
    state.judge.pairs.forEach((pair, i) => {
      const imgA = el("img"), imgB = el("img");
      showImage(imgA, thumb(pair.a.id), basename(pair.a.path));
      showImage(imgB, thumb(pair.b.id), basename(pair.b.path));
      const chance = pair.probability == null ? "" : ` · chance of same ${Math.round(pair.probability * 100)}%`;
      const facts = el("div", { class: "facts" }, [
        el("div", { text: `${basename(pair.a.path)} and ${basename(pair.b.path)}` }),
        el("div", { class: "muted", text: `similarity ${pair.similarity.toFixed(3)}${chance}` }),
      ]);
      const open = el("button", { type: "button", class: "judge-open",
                                  text: i === state.judge.index ? "Shown above" : "Judge this pair" });
      if (i === state.judge.index) { open.disabled = true; open.setAttribute("aria-current", "true"); }
      open.addEventListener("click", () => { state.judge.index = i; showJudgePair(); $("judge-title").focus(); });
      list.append(el("li", {}, [imgA, imgB, facts, open]));
    });
    if (!state.judge.pairs.length) list.append(el("li", { text: "Nothing to judge here." }));
  }

  function moveJudge(step) {
    const next = state.judge.index + step;
    if (next < 0 || next >= state.judge.pairs.length) return;
    state.judge.index = next;
    showJudgePair();
  }

  // One verdict POST; on 401/403 it is kept so that entering the key sends it again.
  async function postVerdict(a, b, verdict, stored) {
    const send = async () => {
      try {
        const body = await api("/v1/verdicts", {
          method: "POST",
          headers: { "Content-Type": "application/json" },
          body: JSON.stringify({ file_a: a, file_b: b, verdict: verdict, origin: "review" }),
        });
        await stored(body);
      } catch (e) {
        toast("Not stored: " + e.message, true);
        if (e.status === 401 || e.status === 403) state.retry = send;
      }
    };
    await send();
  }

  async function judge(verdict) {
    const pair = state.judge.pairs[state.judge.index];
    if (!pair) return;
    await postVerdict(pair.a.id, pair.b.id, verdict, async () => {
        toast(`Marked ${verdict}: #${pair.a.id} and #${pair.b.id}`);
        state.group = null;  // the groups apply the verdict at once: load them again when opened
        // The next pair comes: the judged one leaves this page, and an empty page asks for the next.
        state.judge.pairs = state.judge.pairs.filter((p) => p !== pair);
        state.judge.page.total = Math.max(0, state.judge.page.total - 1);
        if (!state.judge.pairs.length) await loadJudgePage();
        showJudgePair();
    });
  }

  $("judge-same").addEventListener("click", () => judge("same"));
  $("judge-different").addEventListener("click", () => judge("different"));
  $("judge-next").addEventListener("click", () => moveJudge(1));
  $("judge-prev").addEventListener("click", () => moveJudge(-1));

  // -- groups --------------------------------------------------------------------------------
  async function renderGroups() {
    showView("groups");
    const list = $("group-list");
    list.replaceChildren();
    $("groups-summary").textContent = "Loading groups…";
    const q = new URLSearchParams({ limit: PAGE_SIZE, offset: state.page * PAGE_SIZE, min_size: state.minSize });
    if (state.tier) q.set("tier", state.tier);
    let page;
    try {
      page = await api("/v1/groups?" + q);
    } catch (e) {
      $("groups-summary").textContent = e.message;
      state.retry = renderGroups;
      return;
    }
    const pages = Math.max(1, Math.ceil(page.total / PAGE_SIZE));
    $("groups-summary").textContent = page.total
      ? `${page.total} groups in generation ${page.generation}. The keeper is outlined.`
      : "No groups match.";
    $("page-label").textContent = `Page ${state.page + 1} of ${pages}`;
    $("prev-page").disabled = state.page === 0;
    $("next-page").disabled = state.page + 1 >= pages;
    for (const g of page.groups) {
      const thumbs = el("div", { class: "thumbs" });
      for (const m of g.members.slice(0, 8)) {
        const img = el("img", { class: m.id === g.keeper ? "keeper" : "" });
        showImage(img, thumb(m.id), basename(m.path));
        thumbs.append(img);
      }
      if (g.size > 8) thumbs.append(el("span", { class: "more", text: `+${g.size - 8}` }));
      // Each file by name and folder (relative to its source), the keeper first; a large group lists its first.
      const names = el("ul", { class: "names" }, g.members.slice(0, 4).map((m) =>
        el("li", { class: m.id === g.keeper ? "keeper" : "" }, [
          el("span", { class: "name", text: m.name || basename(m.path) }),
          el("span", { class: "muted", text: m.folder && m.folder !== "." ? ` in ${m.folder}` : "" }),
        ])));
      if (g.size > 4) names.append(el("li", { class: "muted", text: `and ${g.size - 4} more` }));
      const card = el("a", { class: "group-card", href: "#/group/" + encodeURIComponent(g.gid),
                             "aria-label": `${tierName(g.tier)} group of ${g.size} files, keeper ${basename(g.members[0].path)}` }, [
        el("div", { class: "head" }, [
          el("span", { class: "tier", text: tierName(g.tier) }),
          el("span", { class: "muted", text: `${g.size} files · ${bytes(g.reclaimable_bytes)} reclaimable` }),
        ]),
        thumbs,
        names,
        el("span", { class: "open", "aria-hidden": "true", text: "Open the group →" }),
      ]);
      list.append(el("li", {}, [card]));
    }
  }

  $("group-filters").addEventListener("submit", (event) => {
    event.preventDefault();
    state.tier = $("filter-tier").value;
    state.minSize = Math.max(2, parseInt($("filter-min").value, 10) || 2);
    state.page = 0;
    renderGroups();
  });
  $("prev-page").addEventListener("click", () => { state.page = Math.max(0, state.page - 1); renderGroups(); });
  $("next-page").addEventListener("click", () => { state.page += 1; renderGroups(); });

  // -- one group -----------------------------------------------------------------------------
  // `now` (indexer/acting/explain.py) is the group as a quarantine would see it: the file to keep and why,
  // each member's metadata, what would happen to it, and where it matches the keeper.
  async function loadGroup(gid) {
    if (state.group && state.group.gid === gid) return state.group;
    const group = await api("/v1/groups/" + encodeURIComponent(gid));
    state.group = group;
    if (group.now) {
      const [keeper, ...others] = group.now.members;
      state.pairs = others.map((m) => [keeper, m]);
    } else {
      const keeper = group.members.find((m) => m.id === group.keeper) || group.members[0];
      state.pairs = group.members.filter((m) => m.id !== keeper.id).map((m) => [keeper, m]);
    }
    return group;
  }

  function verdictOf(a, b) {
    const found = (state.group.verdicts || []).filter(
      (v) => (v.a === a && v.b === b) || (v.a === b && v.b === a));
    return found.length ? found[found.length - 1].verdict : null;
  }

  // The metadata a keeper is chosen by, one row each, in the same order on every card.
  function metaRows(m) {
    const rows = [["Pixels", `${m.width}×${m.height}`], ["File", `${bytes(m.file_size)} · ${m.format || "?"}`]];
    if ("captured" in m) {
      rows.push(["Captured", m.captured ? m.captured.replace("T", " ") : "no capture time"],
                ["Camera", m.camera || "not named"], ["Colour profile", m.icc ? "ICC profile" : "none"],
                ["Modified", (m.modified || "").replace("T", " ").replace("Z", " UTC")],
                ["Folder", m.folder && m.folder !== "." ? m.folder : "the top of its source"]);
    }
    return el("dl", { class: "meta" }, rows.flatMap(([k, v]) => [el("dt", { text: k }), el("dd", { text: v })]));
  }

  // An image with the common region outlined (`box`: x0, y0, x1, y1 as fractions of its width and height).
  // The region is placed on the picture itself: a square tile shows it whole and centred (object-fit:
  // contain), so the box is moved into the picture's part of the tile once its natural size is known.
  function framed(img, box) {
    const frame = el("span", { class: "frame" }, [img]);
    if (box) {
      const region = el("span", { class: "region", "aria-hidden": "true" });
      const place = () => {
        const w = img.clientWidth, h = img.clientHeight, nw = img.naturalWidth, nh = img.naturalHeight;
        let sx = 1, sy = 1;
        if (w && h && nw && nh) { const s = Math.min(w / nw, h / nh); sx = (nw * s) / w; sy = (nh * s) / h; }
        const ox = (1 - sx) / 2, oy = (1 - sy) / 2;
        region.style.left = `${(ox + box[0] * sx) * 100}%`; region.style.top = `${(oy + box[1] * sy) * 100}%`;
        region.style.width = `${(box[2] - box[0]) * sx * 100}%`; region.style.height = `${(box[3] - box[1]) * sy * 100}%`;
      };
      place();
      img.addEventListener("load", place);
      frame.append(region);
    }
    return frame;
  }

  function matchWords(match) {
    if (!match) return "";
    if (match.verified && match.inliers == null) return "Identical pixels: the whole picture matches.";
    if (match.verified) return `Matches the keeper in the outlined region (${match.inliers} keypoints agree).`;
    return match.reason.charAt(0).toUpperCase() + match.reason.slice(1) + ".";
  }

  async function keepThis(gid, id, method) {
    const send = async () => {
      try {
        if (method === "DELETE") await api("/v1/keepers/" + encodeURIComponent(id), { method: "DELETE" });
        else await api("/v1/keepers", { method: "POST", headers: { "Content-Type": "application/json" },
                                         body: JSON.stringify({ file: id }) });
        toast(method === "DELETE" ? "The keeper rules choose again." :
              `Keeping #${id}: the quarantine plan now keeps it and compares the others with it.`);
        state.group = null;
        renderGroup(gid);
      } catch (e) {
        toast("Not changed: " + e.message, true);
        if (e.status === 401 || e.status === 403) state.retry = send;
      }
    };
    await send();
  }

  // A verdict on every pair of the group at once (each copy against the keeper), with an undo that takes
  // those verdicts back (DELETE /v1/verdicts) while the bar shows.
  let undoTimer = null;
  function offerUndo(text, ids, gid) {
    $("undo-text").textContent = text;
    $("undo-bar").hidden = false;
    clearTimeout(undoTimer);
    undoTimer = setTimeout(() => { $("undo-bar").hidden = true; }, 30000);
    $("undo-button").onclick = async () => {
      try {
        const body = await api("/v1/verdicts?ids=" + ids.join(","), { method: "DELETE" });
        $("undo-bar").hidden = true;
        toast(`Taken back: ${body.removed} verdicts.`);
        state.group = null;
        const target = "#/group/" + encodeURIComponent(gid);
        if (location.hash === target) route(); else location.hash = target;
      } catch (e) {
        toast("Not taken back: " + e.message, true);
      }
    };
  }

  async function judgeGroup(verdict) {
    if (!state.group) return;
    const gid = state.group.gid;
    // Files with the keeper's bytes are one content: there is nothing to judge between them.
    const pairs = state.pairs.filter(([, m]) => m.tier !== "same-bytes")
      .map(([k, m]) => ({ file_a: k.id, file_b: m.id, verdict: verdict }));
    if (!pairs.length) { toast("Every copy here has the keeper's bytes: there is nothing to judge.", true); return; }
    const send = async () => {
      try {
        const body = await api("/v1/verdicts", {
          method: "POST", headers: { "Content-Type": "application/json" },
          body: JSON.stringify({ verdicts: pairs, origin: "review" }),
        });
        const ids = body.verdicts.map((v) => v.id);
        state.group = null;
        if (verdict === "same") {
          offerUndo(`Marked all ${ids.length} copies the same picture as the keeper.`, ids, gid);
          renderGroup(gid);
        } else {
          offerUndo(`Marked ${ids.length} copies different from the keeper: the group is split.`, ids, gid);
          location.hash = "#/groups";
        }
      } catch (e) {
        toast("Not stored: " + e.message, true);
        if (e.status === 401 || e.status === 403) state.retry = send;
      }
    };
    await send();
  }
  $("group-same").addEventListener("click", () => judgeGroup("same"));
  $("group-wrong").addEventListener("click", () => judgeGroup("different"));

  function memberCard(gid, m, index, keeper) {
    const img = el("img");
    showImage(img, thumb(m.id), basename(m.path));
    const isKeeper = index < 0;
    const card = el("li", { class: isKeeper ? "member keeper" : "member" }, [
      framed(img, m.match ? m.match.member_box : null),
      el("div", { class: "name", text: basename(m.path) }),
    ]);
    if (isKeeper) {
      card.append(el("span", { class: "badge keep", text: state.group.now && state.group.now.picked ? "kept: your choice" : "kept" }));
    } else {
      const what = { move: "would move", stay: "stays", changed: "left alone" }[m.action] || "";
      card.append(el("div", { class: "muted", text: `${tierName(m.tier || "")}${m.tier ? " · " : ""}similarity ${m.similarity.toFixed(3)}` }));
      if (what) card.append(el("div", { class: "action", text: `${what}: ${m.why}` }));
      const verdict = verdictOf(keeper.id, m.id);
      if (verdict) card.append(el("span", { class: "badge " + verdict, text: "marked " + verdict }));
    }
    card.append(metaRows(m));
    if (!isKeeper) {
      if (m.match) card.append(el("p", { class: "match-note muted", text: matchWords(m.match) }));
      const open = el("button", { type: "button", class: "compare", text: "Compare" });
      open.addEventListener("click", () => { location.hash = `#/pair/${encodeURIComponent(gid)}/${index}`; });
      const keep = el("button", { type: "button", class: "keep-this", text: "Keep this one" });
      keep.addEventListener("click", () => keepThis(gid, m.id, "POST"));
      card.append(el("div", { class: "actions" }, [open, keep]));
    } else if (state.group.now && state.group.now.picked) {
      const undo = el("button", { type: "button", class: "keep-undo", text: "Let the rules choose" });
      undo.addEventListener("click", () => keepThis(gid, m.id, "DELETE"));
      card.append(el("div", { class: "actions" }, [undo]));
    }
    return card;
  }

  async function renderGroup(gid) {
    showView("group");
    const list = $("pair-list");
    list.replaceChildren();
    let group;
    try {
      group = await loadGroup(gid);
    } catch (e) {
      $("group-title").textContent = "Group not found";
      $("group-facts").textContent = e.message;
      state.retry = () => renderGroup(gid);
      return;
    }
    $("group-title").textContent = `${tierName(group.tier)} group of ${group.size} files`;
    const keeper = state.pairs.length ? state.pairs[0][0] : (group.now ? group.now.members[0] : null);
    const why = group.now ? ` It ${group.now.keeper_reason}.` : "";
    $("group-facts").textContent = `Keep ${basename(keeper ? keeper.path : "")}.${why} ` +
      `${bytes(group.reclaimable_bytes)} reclaimable. Generation ${group.generation}.`;
    if (keeper) list.append(memberCard(gid, keeper, -1, keeper));
    state.pairs.forEach(([k, member], i) => list.append(memberCard(gid, member, i, k)));
    if (!state.pairs.length) list.append(el("li", { text: "This group has no pair to compare." }));
  }

  // -- one pair, side by side ---------------------------------------------------------------------
  async function renderPair(gid, index) {
    showView("pair");
    try {
      await loadGroup(gid);
    } catch (e) {
      $("pair-state").textContent = e.message;
      return;
    }
    if (!state.pairs.length) { location.hash = "#/group/" + encodeURIComponent(gid); return; }
    index = Math.min(Math.max(0, index), state.pairs.length - 1);
    state.pairIndex = index;
    const [a, b] = state.pairs[index];
    $("pair-back").href = "#/group/" + encodeURIComponent(gid);
    $("pair-title").textContent = `Pair ${index + 1} of ${state.pairs.length}: are these the same picture?`;
    const verdict = verdictOf(a.id, b.id);
    $("pair-state").textContent = `Similarity ${b.similarity.toFixed(3)}${b.tier ? ` (${tierName(b.tier)})` : ""}. ` +
      (verdict ? `Marked ${verdict} already; marking again replaces it.` : "Not judged yet.");
    $("pair-match").textContent = matchWords(b.match);
    const imgA = $("img-a"), imgB = $("img-b");
    showImage(imgA, preview(a.id), "kept: " + basename(a.path));
    showImage(imgB, preview(b.id), "copy: " + basename(b.path));
    const box = b.match && b.match.verified && b.match.inliers != null;
    $("frame-a").replaceWith(Object.assign(framed(imgA, box ? b.match.keeper_box : null), { id: "frame-a" }));
    $("frame-b").replaceWith(Object.assign(framed(imgB, box ? b.match.member_box : null), { id: "frame-b" }));
    $("cap-a").textContent = `Keep · #${a.id} · ${a.width}×${a.height} · ${bytes(a.file_size)} · ${a.path}`;
    $("cap-b").textContent = `#${b.id} · ${b.width}×${b.height} · ${bytes(b.file_size)} · ${b.path}`;
    $("pair-prev").disabled = index === 0;
    $("pair-next").disabled = index + 1 >= state.pairs.length;
  }

  function movePair(step) {
    if (!state.group) return;
    const next = state.pairIndex + step;
    if (next < 0 || next >= state.pairs.length) return;
    location.hash = `#/pair/${encodeURIComponent(state.group.gid)}/${next}`;
  }

  async function mark(verdict) {
    if (!state.group || !state.pairs.length) return;
    const [a, b] = state.pairs[state.pairIndex];
    await postVerdict(a.id, b.id, verdict, async (body) => {
        state.group.verdicts = (state.group.verdicts || []).concat(
          [{ a: a.id, b: b.id, verdict: verdict, id: body.verdicts[0].id }]);
        // The groups list and the plan apply a verdict at once: "different" splits this pair.
        toast(`Marked ${verdict}: #${a.id} and #${b.id}` +
              (verdict === "different" ? " (no longer grouped together)" : ""));
        if (state.pairIndex + 1 < state.pairs.length) movePair(1);
        else renderPair(state.group.gid, state.pairIndex);
    });
  }

  $("mark-same").addEventListener("click", () => mark("same"));
  $("mark-different").addEventListener("click", () => mark("different"));
  $("pair-next").addEventListener("click", () => movePair(1));
  $("pair-prev").addEventListener("click", () => movePair(-1));

  // Each image is shown at its own size (up to the screen's width); "same width" scales both to fill
  // (in the group's pairs and in the pairs to judge alike).
  function toggleFit() {
    const fit = $("side-by-side").classList.toggle("fit");
    $("judge-side").classList.toggle("fit", fit);
    for (const button of document.querySelectorAll(".fit-toggle")) button.setAttribute("aria-pressed", String(fit));
  }
  // On a narrow screen one picture at a time, in the same place: T (or the button) shows the other.
  function toggleSwap() {
    const showB = $("side-by-side").classList.toggle("show-b");
    $("judge-side").classList.toggle("show-b", showB);
    for (const button of document.querySelectorAll(".swap-toggle")) button.setAttribute("aria-pressed", String(showB));
  }
  $("pair-swap").addEventListener("click", toggleSwap);
  $("judge-swap").addEventListener("click", toggleSwap);
  $("pair-fit").addEventListener("click", toggleFit);
  $("judge-fit").addEventListener("click", toggleFit);

  // The same keys in both views where a pair is shown: S, D, N, P, F, T (and Esc back to a group).
  const PAIR_KEYS = {
    pair: { s: () => mark("same"), d: () => mark("different"), n: () => movePair(1), p: () => movePair(-1) },
    judge: { s: () => judge("same"), d: () => judge("different"), n: () => moveJudge(1), p: () => moveJudge(-1) },
  };

  document.addEventListener("keydown", (event) => {
    const view = !$("view-pair").hidden ? "pair" : !$("view-judge").hidden && state.judge.pairs.length ? "judge" : null;
    if (!view || event.altKey || event.ctrlKey || event.metaKey) return;
    const tag = (event.target.tagName || "").toLowerCase();
    if (tag === "input" || tag === "select" || tag === "textarea") return;
    const key = { arrowright: "n", arrowleft: "p" }[event.key.toLowerCase()] || event.key.toLowerCase();
    const act = PAIR_KEYS[view][key];
    if (act) { event.preventDefault(); act(); }
    else if (key === "f") { event.preventDefault(); toggleFit(); }
    else if (key === "t") { event.preventDefault(); toggleSwap(); }
    else if (key === "escape" && view === "pair" && state.group) {
      location.hash = "#/group/" + encodeURIComponent(state.group.gid);
    }
  });

  // -- search by image -------------------------------------------------------------------------------
  function renderSearch() { showView("search"); }

  function renderResults(answer, heading) {
    const list = $("search-results");
    list.replaceChildren();
    const dups = answer.results.filter((r) => r.duplicate).length;
    $("search-summary").textContent = `${heading}: ${answer.results.length} similar images, ` +
      `${dups} at or above the duplicate threshold ${answer.threshold.toFixed(3)} (generation ${answer.generation}).`;
    for (const r of answer.results) {
      const img = el("img");
      showImage(img, thumb(r.id), basename(r.path));
      const again = el("button", { type: "button", text: "Similar to this" });
      again.addEventListener("click", () => searchById(r.id, basename(r.path)));
      list.append(el("li", { class: "result" }, [
        img,
        el("div", { class: "facts" }, [
          el("div", { class: r.duplicate ? "dup" : "", text: `${r.similarity.toFixed(3)}${r.duplicate ? " · duplicate" : ""}` }),
          el("div", { class: "name", text: basename(r.path) || "#" + r.id }),
          el("div", { class: "path", text: r.path || "" }),
        ]),
        again,
      ]));
    }
  }

  function k() { return Math.min(100, Math.max(1, parseInt($("search-k").value, 10) || 12)); }

  async function searchFile(file) {
    if (!file) return;
    $("search-summary").textContent = `Searching for ${file.name}…`;
    try {
      const answer = await api("/v1/search?k=" + k(), {
        method: "POST",
        headers: { "Content-Type": file.type || "application/octet-stream" },
        body: file,
      });
      renderResults(answer, file.name);
    } catch (e) {
      $("search-summary").textContent = "Search failed: " + e.message;
      state.retry = () => searchFile(file);
    }
  }

  async function searchById(id, name) {
    $("search-summary").textContent = `Searching for images like ${name}…`;
    try {
      renderResults(await api(`/v1/images/${encodeURIComponent(id)}/similar?k=${k()}`), name);
      $("search-title").focus();
    } catch (e) {
      $("search-summary").textContent = "Search failed: " + e.message;
    }
  }

  $("search-file").addEventListener("change", (event) => searchFile(event.target.files[0]));
  const zone = $("drop-zone");
  zone.addEventListener("dragover", (event) => { event.preventDefault(); zone.classList.add("over"); });
  zone.addEventListener("dragleave", () => zone.classList.remove("over"));
  zone.addEventListener("drop", (event) => {
    event.preventDefault();
    zone.classList.remove("over");
    searchFile(event.dataTransfer.files[0]);
  });

  // -- routing -----------------------------------------------------------------------------------------
  function route() {
    const hash = location.hash || "#/judge";
    const parts = hash.replace(/^#\/?/, "").split("/").map(decodeURIComponent);
    if (parts[0] === "group" && parts[1]) renderGroup(parts[1]);
    else if (parts[0] === "pair" && parts[1]) renderPair(parts[1], parseInt(parts[2], 10) || 0);
    else if (parts[0] === "search") renderSearch();
    else if (parts[0] === "groups") renderGroups();
    else renderJudge();
  }

  // `nearsight serve` prints the page's address with #key=...: keep the key for this tab, drop it from the URL.
  if (location.hash.startsWith("#key=")) {
    state.key = decodeURIComponent(location.hash.slice(5));
    sessionStorage.setItem(KEY_STORE, state.key);
    history.replaceState(null, "", location.pathname + "#/judge");
  }
  window.addEventListener("hashchange", route);
  loadStatus();
  route();
})();
