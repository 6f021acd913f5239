// The observer's page: live updates (server-sent events), clocks, the now line, the style switch.
// No library, no other host: everything comes from the server that sent the page.
"use strict";
(function () {
  const page = document.getElementById("page");
  const live = document.getElementById("live");
  const tz = page.dataset.tz;
  let offsetMs = 0;          // server clock (maybe a rehearsal clock) minus this browser's clock
  let style = page.dataset.style || "night";
  let lastKey = null;
  try { lastKey = JSON.parse(page.dataset.key || "null"); } catch (e) { lastKey = null; }
  let boundaryTimer = null;
  let fetching = null;

  function serverNow() { return new Date(Date.now() + offsetMs); }
  function syncClock(iso) { if (iso) offsetMs = Date.parse(iso) - Date.now(); }

  const fmtUTC = new Intl.DateTimeFormat("en-GB", { timeZone: "UTC", hour: "2-digit", minute: "2-digit", second: "2-digit", hourCycle: "h23" });
  let fmtLocal;
  try {
    fmtLocal = new Intl.DateTimeFormat("en-GB", { timeZone: tz, hour: "2-digit", minute: "2-digit", second: "2-digit", hourCycle: "h23" });
  } catch (e) { fmtLocal = fmtUTC; }

  function span(ms) {
    const s = Math.max(0, Math.round(ms / 1000));
    const h = Math.floor(s / 3600), m = Math.floor((s % 3600) / 60), r = s % 60;
    if (h > 0) return h + " h " + String(m).padStart(2, "0") + " min";
    return m + " min " + String(r).padStart(2, "0") + " s";
  }

  function tick() {
    const now = serverNow();
    document.getElementById("clock-utc").textContent = fmtUTC.format(now);
    document.getElementById("clock-local").textContent = fmtLocal.format(now);
    const left = document.getElementById("time-left");
    if (left) left.textContent = span(Date.parse(left.dataset.end) - now.getTime());
    const hb = document.getElementById("heartbeat");
    if (hb && hb.dataset.at) {
      const age = (Date.now() - Date.parse(hb.dataset.at)) / 1000;  // heartbeats are wall-clock times
      hb.textContent = hb.dataset.at + " (" + Math.max(0, Math.round(age)) + " s ago)";
    }
    const tl = document.getElementById("timeline");
    const line = document.getElementById("now-line");
    if (tl && line) {
      const a = Date.parse(tl.dataset.start), b = Date.parse(tl.dataset.end), t = now.getTime();
      if (t >= a && t <= b) { line.hidden = false; line.style.left = (100 * (t - a) / (b - a)).toFixed(3) + "%"; }
      else line.hidden = true;
    }
    for (const el of document.querySelectorAll("[data-start][data-end][data-rid]")) {
      const s = Date.parse(el.dataset.start), e = Date.parse(el.dataset.end), t = now.getTime();
      const state = t >= e ? "past" : (t >= s ? "in-progress" : "coming");
      for (const c of ["past", "in-progress", "coming"]) el.classList.toggle("state-" + c, c === state);
      const st = el.querySelector(".st");
      if (st) st.textContent = state.replace("-", " ");
    }
  }

  function nextBoundary() {
    // refetch when an entry starts or ends (what is in progress changes), and at least every minute
    const t = serverNow().getTime();
    let soonest = t + 60000;
    for (const el of document.querySelectorAll("[data-start][data-end][data-rid]")) {
      for (const x of [Date.parse(el.dataset.start), Date.parse(el.dataset.end)]) {
        if (x > t && x < soonest) soonest = x;
      }
    }
    clearTimeout(boundaryTimer);
    boundaryTimer = setTimeout(refresh, Math.max(500, soonest - t + 300));
  }

  function setChart(key) {
    const img = document.getElementById("chart");
    const section = document.getElementById("chart-section");
    if (!key) { section.hidden = true; return; }
    section.hidden = false;
    const src = "chart.svg?style=" + style + "&k=" + encodeURIComponent(key);
    if (img.getAttribute("src") !== src) img.setAttribute("src", src);
    page.dataset.chartKey = key;
  }

  async function refresh() {
    if (fetching) return fetching;
    fetching = (async () => {
      try {
        const before = document.getElementById("plan-version");
        const oldVersion = before ? before.dataset.version : null;
        const r = await fetch("view?style=" + style, { cache: "no-store", credentials: "same-origin" });
        if (!r.ok) throw new Error("view " + r.status);
        const v = await r.json();
        syncClock(v.now);
        const scrollY = window.scrollY;
        document.getElementById("top").innerHTML = v.top;
        document.getElementById("bottom").innerHTML = v.bottom;
        window.scrollTo(0, scrollY);
        setChart(v.chart_key);
        const after = document.getElementById("plan-version");
        if (after && oldVersion !== null && after.dataset.version !== oldVersion) after.classList.add("flash");
        document.getElementById("updated").textContent = "updated " + fmtUTC.format(serverNow()) + " UTC";
        tick();
      } catch (e) {
        live.textContent = "update failed; retrying";
        live.className = "pill lost";
      } finally {
        fetching = null;
        nextBoundary();
      }
    })();
    return fetching;
  }

  function onChange(ev) {
    let key;
    try { key = JSON.parse(ev.data); } catch (e) { return; }
    live.textContent = "live";
    live.className = "pill live";
    const prev = lastKey;
    lastKey = key;
    if (prev === null) { refresh(); return; }
    const changed = Object.keys(key).filter((k) => JSON.stringify(key[k]) !== JSON.stringify(prev[k]));
    if (changed.length === 1 && changed[0] === "heartbeat") {
      const hb = document.getElementById("heartbeat");
      if (hb) hb.dataset.at = key.heartbeat;
      return;
    }
    refresh();
  }

  function connect() {
    const es = new EventSource("events");
    es.addEventListener("change", onChange);
    es.onopen = () => { live.textContent = "live"; live.className = "pill live"; };
    es.onerror = () => {
      live.textContent = "reconnecting";
      live.className = "pill lost";
      // after a reconnect the first event is compared with the last one seen: a change while
      // disconnected still refreshes the page
    };
  }

  function setStyle(next) {
    style = next;
    document.documentElement.dataset.style = next;
    page.dataset.style = next;
    document.querySelector('meta[name="color-scheme"]').setAttribute("content", next === "night" ? "dark" : "light");
    const b = document.getElementById("style-toggle");
    b.textContent = next === "night" ? "day style" : "night style";
    b.setAttribute("aria-pressed", next === "day" ? "true" : "false");
    document.cookie = "nightplan_style=" + next + "; Path=/; Max-Age=31536000; SameSite=Strict";
    if (page.dataset.chartKey) setChart(page.dataset.chartKey);
  }

  document.getElementById("style-toggle").addEventListener("click", () => setStyle(style === "night" ? "day" : "night"));
  syncClock(page.dataset.now);
  tick();
  setInterval(tick, 1000);
  nextBoundary();
  connect();
})();
