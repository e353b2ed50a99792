/* fieldmix control page. Plain JS, no build step, no external assets.
 *
 * One websocket to the server (docs/web-api.md). The page keeps a copy of the state from
 * `hello` and replaces parts of it as `source`, `master`, `layout` and `status` messages
 * arrive, whoever caused them. Drags are streamed as `move` requests, coalesced to at most
 * one per MOVE_INTERVAL_MS; the final position is always sent.
 */
"use strict";

(function () {
  const MOVE_INTERVAL_MS = 40;       // at most 25 moves a second while dragging
  const RELEASE_WINDOW_MS = 5000;    // the confirm button of a panic release stays this long
  const METER_FLOOR = -60;           // dB FS at the left end of a meter bar
  const SVGNS = "http://www.w3.org/2000/svg";

  // ------------------------------------------------------------------ token
  const params = new URLSearchParams(location.search);
  let token = params.get("token") || sessionStorage.getItem("fieldmix-token") || "";
  if (params.has("token")) {  // keep the token out of the address bar, history and bookmarks
    sessionStorage.setItem("fieldmix-token", token);
    params.delete("token");
    history.replaceState(null, "", location.pathname + (params.toString() ? "?" + params : ""));
  }

  // ------------------------------------------------------------------ state
  const S = {
    ws: null, connected: false, client: null, state: null, selected: null,
    meters: null, metersDirty: false, nextId: 1, pending: new Map(),
    drag: null, releaseTimer: null, retryTimer: null, extent: 5,
  };
  const $ = (id) => document.getElementById(id);
  const el = (tag, attrs, text) => {
    const e = document.createElement(tag);
    if (attrs) for (const k in attrs) e.setAttribute(k, attrs[k]);
    if (text !== undefined) e.textContent = text;
    return e;
  };
  const sv = (tag, attrs) => {
    const e = document.createElementNS(SVGNS, tag);
    if (attrs) for (const k in attrs) e.setAttribute(k, attrs[k]);
    return e;
  };
  const fmt = (v, d) => (typeof v === "number" && isFinite(v) ? v.toFixed(d) : "–");
  const finite = (v) => typeof v === "number" && isFinite(v);

  // ------------------------------------------------------------------ geometry
  // x right, y front, z up (metres); azimuth 0 = front, positive = left; elevation up.
  function sph(p) {
    const [x, y, z] = p;
    const h = Math.hypot(x, y);
    const d = Math.hypot(h, z);
    let az = d > 1e-9 ? Math.atan2(-x, y) * 180 / Math.PI : 0;
    if (Math.abs(az) < 1e-9) az = 0;
    const elv = d > 1e-9 ? Math.atan2(z, h) * 180 / Math.PI : 0;
    return { azimuth: az, elevation: elv, distance: d };
  }
  function cart(az, elv, d) {
    const a = az * Math.PI / 180, e = elv * Math.PI / 180;
    return [-d * Math.cos(e) * Math.sin(a), d * Math.cos(e) * Math.cos(a), d * Math.sin(e)];
  }

  // ------------------------------------------------------------------ messages out
  function send(obj) {
    if (!S.ws || S.ws.readyState !== WebSocket.OPEN) { toast("not connected: change not sent", true); return null; }
    const id = S.nextId++;
    obj.id = id;
    S.pending.set(id, obj.type);
    S.ws.send(JSON.stringify(obj));
    return id;
  }
  function control(address, args) { return send({ type: "control", address, args }); }
  function sourceAddr(id, param) { return "/source/" + id + "/" + param; }

  let toastTimer = null;
  function toast(text, bad) {
    const t = $("toast");
    t.textContent = text;
    t.className = "toast" + (bad ? " error" : "");
    t.hidden = false;
    clearTimeout(toastTimer);
    toastTimer = setTimeout(() => { t.hidden = true; }, bad ? 6000 : 2500);
  }

  // ------------------------------------------------------------------ connection
  function wsUrl() {
    const scheme = location.protocol === "https:" ? "wss://" : "ws://";
    return scheme + location.host + "/ws" + (token ? "?token=" + encodeURIComponent(token) : "");
  }

  function connect() {
    clearTimeout(S.retryTimer);
    let ws;
    try { ws = new WebSocket(wsUrl()); } catch (e) { scheduleRetry(); return; }
    S.ws = ws;
    ws.onopen = () => { S.connected = true; $("banner-conn").hidden = true; };
    ws.onmessage = (ev) => {
      let m;
      try { m = JSON.parse(ev.data); } catch (e) { toast("unreadable message from the server", true); return; }
      try { handle(m); } catch (e) { console.error(e); toast("page error: " + e.message, true); }
    };
    ws.onclose = () => {
      if (S.ws !== ws) return;
      S.connected = false;
      S.ws = null;
      $("banner-conn").hidden = false;
      setStatusText("disconnected", true);
      diagnose();
    };
  }
  function scheduleRetry() { clearTimeout(S.retryTimer); S.retryTimer = setTimeout(connect, 1000); }

  // a websocket that fails tells the page nothing: ask the HTTP API why
  function diagnose() {
    fetch("/api/state", { headers: token ? { Authorization: "Bearer " + token } : {}, cache: "no-store" })
      .then((r) => {
        if (r.status === 401) { askToken(); return; }
        if (r.status === 403) { setStatusText("refused by the server (origin or host not allowed)", true); }
        scheduleRetry();
      })
      .catch(() => scheduleRetry());
  }

  function askToken() {
    const dlg = $("token-dialog");
    if (dlg.open) return;
    $("token-input").value = "";
    if (typeof dlg.showModal === "function") dlg.showModal(); else dlg.setAttribute("open", "");
    $("token-input").focus();
  }
  $("token-form").addEventListener("submit", (ev) => {
    ev.preventDefault();
    token = $("token-input").value.trim();
    sessionStorage.setItem("fieldmix-token", token);
    const dlg = $("token-dialog");
    if (typeof dlg.close === "function") dlg.close(); else dlg.removeAttribute("open");
    connect();
  });

  // ------------------------------------------------------------------ messages in
  function handle(m) {
    switch (m.type) {
      case "batch": m.messages.forEach(handle); return;
      case "hello": onHello(m); return;
      case "source": onSource(m); return;
      case "master": if (S.state) { S.state.master = m.master; renderMaster(); } return;
      case "layout": if (S.state) { onLayout(m.layout); } return;
      case "status": if (S.state) { S.state.status = m.status; renderStatus(); } return;
      case "meters": S.meters = m; S.metersDirty = true; return;
      case "cues": if (S.state) { S.state.cues = m.cues; renderCues(); } return;
      case "alert": onAlert(m.alert || {}); return;
      case "ack": S.pending.delete(m.id); if (m.request === "layout") toast("layout " + m.layout + " loaded"); return;
      case "error": onError(m); return;
      case "state": if (m.state) { S.state = m.state; renderAll(); } return;
      default: return;  // newer servers may add types: ignore what we do not know
    }
  }

  function onHello(m) {
    S.client = m.client;
    S.state = m.state;
    S.meters = null;
    if (S.selected && !findSource(S.selected)) S.selected = null;
    if (!S.selected && S.state.sources.length) S.selected = S.state.sources[0].id;
    renderAll();
    refreshLayouts();
  }

  function onSource(m) {
    if (!S.state) return;
    const src = m.source;
    const i = S.state.sources.findIndex((s) => s.id === src.id);
    if (i < 0) return;
    // while this page drags a source, its own (older, coalesced) echoes must not pull it back
    if (S.drag && S.drag.id === src.id) { S.drag.latest = src; return; }
    S.state.sources[i] = src;
    updateSource(src);
  }

  function onLayout(layout) {
    S.state.layout = layout;
    if (S.state.status) S.state.status.layout_error = null;
    renderPlan();
    renderOutputs();
    renderLayoutError();
    renderLayoutChooser();
  }

  function onAlert(a) {
    if (a.kind === "layout") {
      if (S.state && S.state.status) S.state.status.layout_error = a.message;
      renderLayoutError();
    } else if (a.client !== undefined && a.client === S.client) {
      // our own refusal comes as an error reply too
    } else if (a.message) {
      toast((a.origin ? a.origin + ": " : "") + a.message, true);
    }
  }

  function onError(m) {
    S.pending.delete(m.id);
    toast(m.message || m.reason || "refused", true);
    if (m.request === "control" || m.request === "move") renderAll();  // undo what the page showed
  }

  // ------------------------------------------------------------------ helpers
  function findSource(id) { return S.state ? S.state.sources.find((s) => s.id === id) : null; }
  function anySolo() { return S.state ? S.state.sources.some((s) => s.solo) : false; }

  function renderAll() {
    if (!S.state) return;
    $("show-name").textContent = S.state.show || "";
    renderPlan();
    renderStrips();
    renderOutputs();
    renderInspector();
    renderMaster();
    renderStatus();
    renderLayoutError();
    renderLayoutChooser();
    renderSolo();
    renderCues();
  }

  // ------------------------------------------------------------------ plan view
  function planExtent() {
    let r = 1.5;
    const all = S.state.layout.speakers.map((s) => s.position).concat(S.state.sources.map((s) => s.position));
    for (const p of all) r = Math.max(r, Math.hypot(p[0], p[1]));
    return Math.min(r * 1.18, 500);
  }
  function niceScale(extent) {  // a scale bar of about a quarter of the plan's half width
    const target = extent / 2;
    const pow = Math.pow(10, Math.floor(Math.log10(target)));
    for (const k of [5, 2, 1]) if (k * pow <= target) return k * pow;
    return pow;
  }

  function renderPlan() {
    const svg = $("plan");
    const R = planExtent();
    S.extent = R;
    svg.setAttribute("viewBox", `${-R} ${-R} ${2 * R} ${2 * R}`);
    svg.textContent = "";
    const fs = R * 0.045;
    const g = sv("g", { class: "bg" });
    const step = niceScale(R) / 1;
    for (let d = step; d < R; d += step) {
      g.appendChild(sv("circle", { class: "ring", cx: 0, cy: 0, r: d, "stroke-width": R * 0.003 }));
    }
    g.appendChild(sv("line", { class: "axis", x1: -R, y1: 0, x2: R, y2: 0, "stroke-width": R * 0.003 }));
    g.appendChild(sv("line", { class: "axis", x1: 0, y1: -R, x2: 0, y2: R, "stroke-width": R * 0.003 }));
    const front = sv("text", { class: "front", x: 0, y: -R + fs * 1.1, "font-size": fs, "text-anchor": "middle" });
    front.textContent = "front";
    g.appendChild(front);
    // the listener: a head with a nose pointing to the front
    const head = R * 0.035;
    g.appendChild(sv("circle", { class: "listener", cx: 0, cy: 0, r: head, "stroke-width": R * 0.006 }));
    g.appendChild(sv("polygon", { class: "front", points: `${-head * 0.45},${-head * 0.9} ${head * 0.45},${-head * 0.9} 0,${-head * 1.6}` }));
    // distance scale
    const sc = sv("g", { class: "scale", "data-metres": step });
    const x0 = -R * 0.95, y0 = R * 0.93;
    sc.appendChild(sv("line", { x1: x0, y1: y0, x2: x0 + step, y2: y0, "stroke-width": R * 0.008 }));
    sc.appendChild(sv("line", { x1: x0, y1: y0 - fs * 0.4, x2: x0, y2: y0 + fs * 0.4, "stroke-width": R * 0.005 }));
    sc.appendChild(sv("line", { x1: x0 + step, y1: y0 - fs * 0.4, x2: x0 + step, y2: y0 + fs * 0.4, "stroke-width": R * 0.005 }));
    const st = sv("text", { x: x0 + step / 2, y: y0 - fs * 0.6, "font-size": fs * 0.9, "text-anchor": "middle" });
    st.textContent = (step >= 1 ? step : step.toFixed(1)) + " m";
    sc.appendChild(st);
    g.appendChild(sc);
    svg.appendChild(g);

    // speakers
    const spk = sv("g", { class: "speakers" });
    const size = R * 0.05;
    for (const s of S.state.layout.speakers) {
      const [x, y] = s.position;
      const level = s.sub ? "sub" : s.elevation > 10 ? "up" : s.elevation < -10 ? "down" : "ear";
      const gs = sv("g", { class: "spk " + level, "data-id": s.id, "data-output": s.output, transform: `translate(${x} ${-y})` });
      const title = sv("title");
      title.textContent = `speaker ${s.id}, output ${s.output}` + (s.sub ? ", sub" : `, azimuth ${fmt(s.azimuth, 0)}°, elevation ${fmt(s.elevation, 0)}°, ${fmt(s.distance, 2)} m`);
      gs.appendChild(title);
      if (level === "sub") gs.appendChild(sv("circle", { r: size * 0.6, "stroke-width": R * 0.004 }));
      else if (level === "up") gs.appendChild(sv("polygon", { points: `0,${-size * 0.75} ${size * 0.75},0 0,${size * 0.75} ${-size * 0.75},0`, "stroke-width": R * 0.006 }));
      else gs.appendChild(sv("rect", { x: -size / 2, y: -size / 2, width: size, height: size, rx: size * 0.15, "stroke-width": R * 0.004 }));
      // label outside the speaker, away from the centre
      const h = Math.hypot(x, y) || 1;
      const lx = (x / h) * size * 1.5, ly = (-y / h) * size * 1.5;
      const t = sv("text", { x: lx, y: ly, "font-size": fs * 0.85, "text-anchor": "middle", "dominant-baseline": "middle" });
      t.textContent = s.id;
      gs.appendChild(t);
      const c = sv("text", { class: "ch", x: lx, y: ly + fs * 0.9, "font-size": fs * 0.7, "text-anchor": "middle", "dominant-baseline": "middle" });
      c.textContent = "out " + s.output + (level === "up" || level === "down" ? ` ${s.elevation > 0 ? "+" : ""}${fmt(s.elevation, 0)}°` : "");
      gs.appendChild(c);
      spk.appendChild(gs);
    }
    svg.appendChild(spk);

    const srcs = sv("g", { class: "sources" });
    for (const s of S.state.sources) srcs.appendChild(makeSourceMarker(s));
    svg.appendChild(srcs);
  }

  function makeSourceMarker(s) {
    const R = S.extent, fs = R * 0.045, r = R * 0.038;
    const g = sv("g", { class: "src", "data-id": s.id, tabindex: 0, role: "button" });
    g.appendChild(sv("path", { class: "spread" }));
    g.appendChild(sv("circle", { class: "halo", r: r * 1.6, "stroke-width": R * 0.006 }));
    g.appendChild(sv("circle", { class: "body", r: r, "stroke-width": R * 0.005 }));
    g.appendChild(sv("circle", { class: "grip", r: r * 2.2, fill: "transparent" }));  // a larger touch target
    const t = sv("text", { y: -r * 1.6, "font-size": fs, "text-anchor": "middle", "stroke-width": fs * 0.2 });
    t.textContent = s.name || s.id;
    g.appendChild(t);
    g.addEventListener("pointerdown", (ev) => startDrag(ev, s.id, g));
    g.addEventListener("keydown", (ev) => keyMove(ev, s.id));
    g.addEventListener("focus", () => select(s.id));
    placeMarker(g, s, s.position);
    return g;
  }

  function placeMarker(g, s, p) {
    g.setAttribute("transform", `translate(${p[0]} ${-p[1]})`);
    const sp = sph(p);
    g.setAttribute("aria-label", `source ${s.name || s.id}: azimuth ${fmt(sp.azimuth, 1)} degrees, distance ${fmt(sp.distance, 2)} metres${s.mute ? ", muted" : ""}`);
    g.classList.toggle("selected", s.id === S.selected);
    g.classList.toggle("muted", !!s.mute || (anySolo() && !s.solo));
    // spread: a wedge of the source's width, drawn at the source's distance
    const path = g.querySelector("path.spread");
    const spread = s.spread || 0;
    if (spread > 0.5 && sp.distance > 1e-6) {
      const half = Math.min(spread, 359.9) / 2 * Math.PI / 180;
      const a0 = Math.atan2(-p[1], p[0]);  // direction from listener, in screen coordinates
      const d = Math.hypot(p[0], p[1]);
      const pts = [];
      for (let k = 0; k <= 24; k++) {
        const a = a0 - half + (2 * half * k) / 24;
        pts.push(`${d * Math.cos(a) - p[0]},${d * Math.sin(a) + p[1]}`);
      }
      path.setAttribute("d", `M ${-p[0]},${p[1]} L ${pts.join(" L ")} Z`);
    } else {
      path.setAttribute("d", "");
    }
  }

  function markerOf(id) { return $("plan").querySelector(`g.src[data-id="${CSS.escape(id)}"]`); }

  function svgPoint(ev) {
    const svg = $("plan");
    const pt = svg.createSVGPoint();
    pt.x = ev.clientX; pt.y = ev.clientY;
    const q = pt.matrixTransform(svg.getScreenCTM().inverse());
    return [q.x, -q.y];
  }

  function startDrag(ev, id, g) {
    if (ev.button !== undefined && ev.button !== 0) return;
    ev.preventDefault();
    select(id);
    const s = findSource(id);
    if (!s) return;
    g.setPointerCapture(ev.pointerId);
    g.classList.add("dragging");
    S.drag = { id, g, pointer: ev.pointerId, z: s.position[2], last: null, sentAt: 0, timer: null, latest: null, moved: false };
    const move = (e) => {
      if (!S.drag || e.pointerId !== S.drag.pointer) return;
      const [x, y] = svgPoint(e);
      const lim = S.extent * 1.5;
      const p = [Math.max(-lim, Math.min(lim, x)), Math.max(-lim, Math.min(lim, y)), S.drag.z];
      S.drag.pos = p;
      S.drag.moved = true;
      const src = findSource(id);
      placeMarker(g, src, p);
      showInspectorValues(p, src);
      queueMove();
    };
    const end = (e) => {
      if (!S.drag || e.pointerId !== S.drag.pointer) return;
      g.removeEventListener("pointermove", move);
      g.removeEventListener("pointerup", end);
      g.removeEventListener("pointercancel", end);
      g.classList.remove("dragging");
      const d = S.drag;
      clearTimeout(d.timer);
      if (d.moved) flushMove(true);
      S.drag = null;
      if (d.latest) {  // the newest state the server sent while dragging
        const i = S.state.sources.findIndex((x) => x.id === d.latest.id);
        if (i >= 0) S.state.sources[i] = d.latest;
        if (!d.moved) updateSource(d.latest);
      }
    };
    g.addEventListener("pointermove", move);
    g.addEventListener("pointerup", end);
    g.addEventListener("pointercancel", end);
  }

  function queueMove() {
    const d = S.drag;
    const wait = d.sentAt + MOVE_INTERVAL_MS - performance.now();
    if (wait <= 0) { flushMove(false); return; }
    if (!d.timer) d.timer = setTimeout(() => { d.timer = null; if (S.drag === d) flushMove(false); }, wait);
  }
  function flushMove(final) {
    const d = S.drag;
    if (!d || !d.pos) return;
    const p = d.pos.map((v) => Math.round(v * 1000) / 1000);
    if (d.last && p[0] === d.last[0] && p[1] === d.last[1] && !final) return;
    if (d.last && p[0] === d.last[0] && p[1] === d.last[1] && final) return;
    d.last = p;
    d.sentAt = performance.now();
    send({ type: "move", source: d.id, position: [p[0], p[1]] });
  }

  function keyMove(ev, id) {
    const s = findSource(id);
    if (!s) return;
    const step = ev.shiftKey ? 0.5 : 0.1;
    const k = { ArrowLeft: [-step, 0], ArrowRight: [step, 0], ArrowUp: [0, step], ArrowDown: [0, -step] }[ev.key];
    if (!k) return;
    ev.preventDefault();
    const p = [s.position[0] + k[0], s.position[1] + k[1]];
    send({ type: "move", source: id, position: [Math.round(p[0] * 1000) / 1000, Math.round(p[1] * 1000) / 1000] });
  }

  function select(id) {
    if (S.selected === id) return;
    S.selected = id;
    for (const g of $("plan").querySelectorAll("g.src")) g.classList.toggle("selected", g.dataset.id === id);
    for (const st of $("strips").querySelectorAll(".strip")) st.classList.toggle("selected", st.dataset.id === id);
    renderInspector();
  }

  // ------------------------------------------------------------------ inspector
  function setIfIdle(input, value) {  // never overwrite what the user is typing
    if (document.activeElement !== input) input.value = value;
  }
  function showInspectorValues(p, s) {
    const sp = sph(p);
    setIfIdle($("in-azimuth"), fmt(sp.azimuth, 1));
    setIfIdle($("in-elevation"), fmt(sp.elevation, 1));
    setIfIdle($("in-distance"), fmt(sp.distance, 2));
    setIfIdle($("in-x"), fmt(p[0], 2));
    setIfIdle($("in-y"), fmt(p[1], 2));
    setIfIdle($("in-z"), fmt(p[2], 2));
    setIfIdle($("sl-elevation"), sp.elevation);
    setIfIdle($("sl-distance"), Math.min(sp.distance, 20));
    $("out-elevation").textContent = fmt(sp.elevation, 0) + "°";
    $("out-distance").textContent = fmt(sp.distance, 2) + " m";
    if (s) {
      setIfIdle($("sl-spread"), s.spread || 0);
      $("out-spread").textContent = fmt(s.spread || 0, 0) + "°";
    }
  }
  function renderInspector() {
    const s = S.selected ? findSource(S.selected) : null;
    $("sel-form").hidden = !s;
    $("sel-hint").hidden = !!s;
    $("sel-title").textContent = s ? `${s.name || s.id} (input ${s.input})` : "No source selected";
    if (s) showInspectorValues(s.position, s);
  }

  function numberFrom(input) {
    const v = Number(input.value);
    if (input.value.trim() === "" || !isFinite(v)) { toast(input.name + ": enter a number", true); return null; }
    return v;
  }
  function bindInspector() {
    const sph3 = ["azimuth", "elevation", "distance"];
    for (const k of sph3) {
      $("in-" + k).addEventListener("change", (ev) => {
        const v = numberFrom(ev.target);
        if (v === null || !S.selected) return;
        send({ type: "move", source: S.selected, [k]: v });
      });
    }
    for (const k of ["x", "y", "z"]) {
      $("in-" + k).addEventListener("change", (ev) => {
        const s = findSource(S.selected);
        const v = numberFrom(ev.target);
        if (v === null || !s) return;
        const p = s.position.slice();
        p["xyz".indexOf(k)] = v;
        send({ type: "move", source: s.id, position: p });
      });
    }
    const live = (slider, fn) => {
      let t = null, lastSent = 0;
      slider.addEventListener("input", () => {
        const due = lastSent + MOVE_INTERVAL_MS - performance.now();
        clearTimeout(t);
        if (due <= 0) { lastSent = performance.now(); fn(Number(slider.value)); }
        else t = setTimeout(() => { lastSent = performance.now(); fn(Number(slider.value)); }, due);
      });
      slider.addEventListener("change", () => { clearTimeout(t); fn(Number(slider.value)); });
    };
    live($("sl-elevation"), (v) => S.selected && send({ type: "move", source: S.selected, elevation: v }));
    live($("sl-distance"), (v) => S.selected && send({ type: "move", source: S.selected, distance: v }));
    live($("sl-spread"), (v) => S.selected && control(sourceAddr(S.selected, "spread"), [v]));
    $("sel-form").addEventListener("submit", (ev) => ev.preventDefault());
  }

  // ------------------------------------------------------------------ strips
  function meterEl(label) {
    const line = el("div", { class: "meter-line" });
    const m = el("div", { class: "meter", role: "meter", "aria-label": label, "aria-valuemin": "-120", "aria-valuemax": "0", "aria-valuenow": "-120" });
    m.appendChild(el("div", { class: "rms" }));
    m.appendChild(el("div", { class: "peak" }));
    line.appendChild(m);
    line.appendChild(el("span", { class: "db" }, "–"));
    return line;
  }

  function renderStrips() {
    const box = $("strips");
    box.textContent = "";
    S.state.sources.forEach((s, i) => {
      const st = el("div", { class: "strip", "data-id": s.id, "data-index": i, role: "group", "aria-label": "source " + (s.name || s.id) });
      const head = el("div", { class: "strip-head" });
      const name = el("button", { type: "button", class: "name", "aria-label": "select " + (s.name || s.id) }, s.name || s.id);
      name.addEventListener("click", () => select(s.id));
      head.appendChild(name);
      head.appendChild(el("span", { class: "ch" }, "in " + s.input));
      st.appendChild(head);

      const gainRow = el("div", { class: "strip-row" });
      const gl = el("label", { for: "gain-" + i }, "gain dB");
      const gr = el("input", { id: "gain-" + i, class: "gain", type: "range", min: "-60", max: "12", step: "0.5", "aria-label": "gain of " + (s.name || s.id) + " in dB" });
      const gn = el("input", { class: "gain-num", type: "number", min: "-120", max: "24", step: "0.5", "aria-label": "gain of " + (s.name || s.id) + ", dB, exact" });
      gr.addEventListener("input", () => { gn.value = gr.value; });
      gr.addEventListener("change", () => control(sourceAddr(s.id, "gain"), [Number(gr.value)]));
      gn.addEventListener("change", () => { const v = numberFrom(gn); if (v !== null) control(sourceAddr(s.id, "gain"), [v]); });
      gainRow.append(gl, gr, gn);
      st.appendChild(gainRow);

      const spRow = el("div", { class: "strip-row" });
      const sl = el("label", { for: "spread-" + i }, "spread °");
      const sr = el("input", { id: "spread-" + i, class: "spread", type: "range", min: "0", max: "360", step: "1", "aria-label": "spread of " + (s.name || s.id) + " in degrees" });
      const sn = el("span", { class: "spread-val hint" });
      sr.addEventListener("input", () => { sn.textContent = sr.value + "°"; });
      sr.addEventListener("change", () => control(sourceAddr(s.id, "spread"), [Number(sr.value)]));
      spRow.append(sl, sr, sn);
      st.appendChild(spRow);

      const btns = el("div", { class: "strip-btns" });
      const mute = el("button", { type: "button", class: "toggle mute", "aria-pressed": "false", "aria-label": "mute " + (s.name || s.id) }, "Mute");
      mute.addEventListener("click", () => { const src = findSource(s.id); control(sourceAddr(s.id, "mute"), [src && src.mute ? 0 : 1]); });
      const solo = el("button", { type: "button", class: "toggle solo", "aria-pressed": "false", "aria-label": "solo " + (s.name || s.id) }, "Solo");
      solo.addEventListener("click", () => { const src = findSource(s.id); control(sourceAddr(s.id, "solo"), [src && src.solo ? 0 : 1]); });
      btns.append(mute, solo);
      st.appendChild(btns);
      st.appendChild(meterEl("input level of " + (s.name || s.id)));
      box.appendChild(st);
      updateStrip(s);
    });
  }

  function stripOf(id) { return $("strips").querySelector(`.strip[data-id="${CSS.escape(id)}"]`); }
  function updateStrip(s) {
    const st = stripOf(s.id);
    if (!st) return;
    st.classList.toggle("selected", s.id === S.selected);
    st.classList.toggle("silenced", !!s.mute || (anySolo() && !s.solo));
    setIfIdle(st.querySelector("input.gain"), Math.max(-60, Math.min(12, s.gain_db)));
    setIfIdle(st.querySelector("input.gain-num"), fmt(s.gain_db, 1));
    setIfIdle(st.querySelector("input.spread"), s.spread || 0);
    st.querySelector(".spread-val").textContent = fmt(s.spread || 0, 0) + "°";
    const mute = st.querySelector("button.mute");
    mute.setAttribute("aria-pressed", s.mute ? "true" : "false");
    mute.textContent = s.mute ? "Muted" : "Mute";
    const solo = st.querySelector("button.solo");
    solo.setAttribute("aria-pressed", s.solo ? "true" : "false");
  }

  function updateSource(s) {
    const g = markerOf(s.id);
    const R = S.extent;
    if (g && !S.drag && Math.hypot(s.position[0], s.position[1]) > R * 1.02) renderPlan();  // outside the plan: zoom out
    else if (g) placeMarker(g, s, s.position);
    const hadSolo = $("banner-solo").hidden === false;
    updateStrip(s);
    if (s.id === S.selected) renderInspector();
    if (hadSolo !== anySolo() || s.solo !== undefined) renderSolo();
  }

  function renderSolo() {
    if (!S.state) return;
    const solos = S.state.sources.filter((s) => s.solo);
    $("banner-solo").hidden = solos.length === 0;
    $("solo-text").textContent = solos.length
      ? `Solo: ${solos.map((s) => s.name || s.id).join(", ")} — every other source is silent`
      : "";
    for (const s of S.state.sources) {
      const g = markerOf(s.id);
      if (g) g.classList.toggle("muted", !!s.mute || (solos.length > 0 && !s.solo));
      const st = stripOf(s.id);
      if (st) st.classList.toggle("silenced", !!s.mute || (solos.length > 0 && !s.solo));
    }
  }

  // ------------------------------------------------------------------ outputs
  function renderOutputs() {
    const box = $("outputs");
    box.textContent = "";
    for (const s of S.state.layout.speakers) {
      const row = el("div", { class: "out", "data-id": s.id });
      const lab = el("span", { class: "label", title: `speaker ${s.id}, output ${s.output}` });
      lab.append(document.createTextNode(s.id + " "), el("span", { class: "ch" }, String(s.output)));
      const m = el("div", { class: "meter", role: "meter", "aria-label": `output level of speaker ${s.id}, output ${s.output}`, "aria-valuemin": "-120", "aria-valuemax": "0", "aria-valuenow": "-120" });
      m.append(el("div", { class: "rms" }), el("div", { class: "peak" }));
      row.append(lab, m, el("span", { class: "db" }, "–"));
      box.appendChild(row);
    }
  }

  function setMeter(m, db, peak, rms) {
    const frac = (v) => Math.max(0, Math.min(1, (v - METER_FLOOR) / -METER_FLOOR));
    const bar = m.children[0], tick = m.children[1];
    bar.style.transform = `scaleX(${frac(rms)})`;
    bar.classList.toggle("hot", rms > -6);
    tick.style.left = `calc(${(frac(peak) * 100).toFixed(2)}% - 1px)`;
    tick.classList.toggle("clip", peak >= -1.05);
    m.setAttribute("aria-valuenow", String(peak));
    m.dataset.peak = String(peak);
    m.dataset.rms = String(rms);
    db.textContent = peak <= -119.95 ? "−∞" : fmt(peak, 1);
  }

  function drawMeters() {
    if (S.metersDirty && S.meters && S.state) {
      S.metersDirty = false;
      const m = S.meters;
      const strips = $("strips").children;
      for (let i = 0; i < strips.length && i < m.in_peak.length; i++) {
        const line = strips[i].querySelector(".meter-line");
        setMeter(line.children[0], line.children[1], m.in_peak[i], m.in_rms[i]);
      }
      const outs = $("outputs").children;
      for (let j = 0; j < outs.length && j < m.out_peak.length; j++) {
        setMeter(outs[j].children[1], outs[j].children[2], m.out_peak[j], m.out_rms[j]);
      }
      document.body.dataset.meterFrame = String(m.frame);
    }
    requestAnimationFrame(drawMeters);
  }

  // ------------------------------------------------------------------ master, panic
  function renderMaster() {
    const mst = S.state.master;
    setIfIdle($("master-gain"), Math.max(-60, Math.min(12, mst.gain_db)));
    setIfIdle($("master-gain-num"), fmt(mst.gain_db, 1));
    const mute = $("master-mute");
    mute.setAttribute("aria-pressed", mst.mute ? "true" : "false");
    mute.textContent = mst.mute ? "Muted" : "Mute";
    const panic = !!mst.panic;
    $("banner-panic").hidden = !panic;
    $("release-box").hidden = !panic;
    const pb = $("panic");
    pb.classList.toggle("engaged", panic);
    pb.textContent = panic ? "SILENCED" : "PANIC";
    pb.setAttribute("aria-pressed", panic ? "true" : "false");
    if (!panic) disarmRelease();
    document.body.dataset.panic = panic ? "1" : "0";
  }
  function disarmRelease() {
    clearTimeout(S.releaseTimer);
    S.releaseTimer = null;
    $("release-confirm").hidden = true;
    $("release-arm").hidden = false;
  }
  function bindMaster() {
    $("panic").addEventListener("click", () => send({ type: "panic" }));
    // releasing is two deliberate steps: arm, then confirm within RELEASE_WINDOW_MS
    $("release-arm").addEventListener("click", () => {
      $("release-arm").hidden = true;
      $("release-confirm").hidden = false;
      $("release-confirm").focus();
      clearTimeout(S.releaseTimer);
      S.releaseTimer = setTimeout(disarmRelease, RELEASE_WINDOW_MS);
    });
    $("release-confirm").addEventListener("click", () => { disarmRelease(); send({ type: "release" }); });
    $("master-gain").addEventListener("input", () => { $("master-gain-num").value = $("master-gain").value; });
    $("master-gain").addEventListener("change", () => control("/master/gain", [Number($("master-gain").value)]));
    $("master-gain-num").addEventListener("change", () => { const v = numberFrom($("master-gain-num")); if (v !== null) control("/master/gain", [v]); });
    $("master-mute").addEventListener("click", () => control("/master/mute", [S.state && S.state.master.mute ? 0 : 1]));
    $("solo-clear").addEventListener("click", () => control("/source/*/solo", [0]));
    $("layout-load").addEventListener("click", () => {
      const name = $("layout-select").value;
      if (name) send({ type: "layout", name });
    });
  }

  // ------------------------------------------------------------------ cues
  const cueText = (c) => (c ? `${c.label}${c.name ? " " + c.name : ""}` : "–");
  function renderCues() {
    const st = S.state.cues;
    const panel = $("cue-panel");
    const list = st && st.cues ? st.cues : [];
    panel.hidden = list.length === 0;
    if (!list.length) return;
    $("cue-current").textContent = cueText(st.current);
    $("cue-next").textContent = cueText(st.next);
    const go = $("cue-go");
    go.disabled = !st.next;
    go.textContent = st.next ? `GO ${st.next.label}` : "GO (end)";
    go.setAttribute("aria-label", st.next ? `GO: fire cue ${cueText(st.next)}` : "GO: no cue on standby");
    const run = $("cue-running");
    run.textContent = "";
    for (const r of st.running || []) {
      const line = el("div", { class: "run" });
      if (r.state === "waiting") {
        line.textContent = `${r.cue} waiting, starts in ${fmt(r.starts_in, 1)} s`;
      } else {
        line.append(document.createTextNode(`${r.cue}${r.name ? " " + r.name : ""}`));
        const bar = el("span", { class: "bar", role: "progressbar", "aria-valuemin": "0", "aria-valuemax": "100",
                                 "aria-valuenow": String(Math.round(100 * (r.progress || 0))), "aria-label": `fade of cue ${r.cue}` });
        const fill = el("i");
        fill.style.width = `${Math.round(100 * (r.progress || 0))}%`;
        bar.appendChild(fill);
        line.append(bar, document.createTextNode(`${Math.round(100 * (r.progress || 0))} % · ${fmt(r.remaining, 1)} s left`));
      }
      run.appendChild(line);
    }
    if (st.chain_in !== null && st.chain_in !== undefined) run.appendChild(el("div", {}, `next cue follows in ${fmt(st.chain_in, 1)} s`));
    const ol = $("cue-list");
    ol.textContent = "";
    for (const c of list) {
      const li = el("li", { "data-number": String(c.number), tabindex: "0", role: "button",
                            "aria-label": `cue ${cueText(c)}, fade ${c.fade} s: put on standby` });
      li.classList.toggle("current", !!st.current && st.current.number === c.number);
      li.classList.toggle("next", !!st.next && st.next.number === c.number);
      li.append(el("span", { class: "num" }, c.label), el("span", { class: "name" }, c.name || ""),
                el("span", { class: "fade" }, `${c.wait ? "wait " + c.wait + " s · " : ""}${c.fade} s${c.chain ? " · chain" : ""}`));
      const standby = () => control("/cue/standby", [c.number]);
      li.addEventListener("click", standby);
      li.addEventListener("keydown", (ev) => { if (ev.key === "Enter" || ev.key === " ") { ev.preventDefault(); standby(); } });
      ol.appendChild(li);
    }
  }
  function bindCues() {
    $("cue-go").addEventListener("click", () => control("/cue/go", []));
    $("cue-back").addEventListener("click", () => control("/cue/back", []));
    $("cue-stop").addEventListener("click", () => control("/cue/stop", []));
  }

  // ------------------------------------------------------------------ layouts
  function refreshLayouts() {
    fetch("/api/layouts", { headers: token ? { Authorization: "Bearer " + token } : {}, cache: "no-store" })
      .then((r) => (r.ok ? r.json() : null))
      .then((d) => {
        if (!d || !S.state) return;
        S.state.layouts = d.available;
        if (d.error && S.state.status) S.state.status.layout_error = d.error;
        renderLayoutChooser();
        renderLayoutError();
      })
      .catch(() => {});
  }
  function renderLayoutChooser() {
    const sel = $("layout-select");
    const names = S.state.layouts || [];
    const activeFile = (S.state.layout.file || "").replace(/\.json$/, "");
    if (document.activeElement !== sel) {
      sel.textContent = "";
      for (const n of names) {
        const o = el("option", { value: n }, n);
        if (n === activeFile) o.selected = true;
        sel.appendChild(o);
      }
    }
    $("layout-active").textContent = `active: ${S.state.layout.name} (${S.state.layout.speakers.length} speakers, ${S.state.layout.panner})`;
  }
  function renderLayoutError() {
    const err = S.state && S.state.status ? S.state.status.layout_error : null;
    $("banner-layout").hidden = !err;
    $("layout-error-text").textContent = err || "";
  }

  // ------------------------------------------------------------------ status line
  function setStatusText(text, bad) {
    const line = $("status-line");
    line.textContent = text;
    line.classList.toggle("bad", !!bad);
  }
  function renderStatus() {
    const st = S.state.status || {};
    const sm = st.summary;
    const line = $("status-line");
    line.classList.remove("bad");
    if (!sm) { line.textContent = "connected"; renderLayoutError(); return; }
    const parts = [];
    const audioBad = sm.audio !== "running";
    parts.push(`<span class="${audioBad ? "bad" : ""}">audio ${esc(sm.audio || "?")}</span>`);
    if (sm.device) parts.push(esc(sm.device));
    if (sm.samplerate) parts.push(`${sm.samplerate} Hz`);
    if (sm.blocksize) parts.push(`${sm.blocksize} frames`);
    parts.push(`<span class="${sm.xruns ? "bad" : ""}" data-k="xruns">xruns ${sm.xruns || 0}</span>`);
    parts.push(`DSP ${finite(sm.dsp_load) ? Math.round(sm.dsp_load * 100) : "–"} %`);
    parts.push(`OSC ${finite(sm.osc_per_s) ? sm.osc_per_s.toFixed(0) : 0} msg/s`);
    parts.push(`${sm.clients || 0} client${sm.clients === 1 ? "" : "s"}`);
    line.innerHTML = parts.join(" · ");
    renderLayoutError();
    if (sm.panic !== undefined && S.state.master && !!sm.panic !== !!S.state.master.panic) {
      S.state.master.panic = !!sm.panic;
      renderMaster();
    }
  }
  function esc(s) { return String(s).replace(/[&<>"]/g, (c) => ({ "&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;" })[c]); }

  // ------------------------------------------------------------------ start
  bindInspector();
  bindMaster();
  bindCues();
  document.addEventListener("visibilitychange", () => {
    if (document.visibilityState === "visible" && S.ws && S.ws.readyState === WebSocket.OPEN) send({ type: "snapshot" });
  });
  requestAnimationFrame(drawMeters);
  window.fieldmixPage = S;  // for the browser tests and curious operators (read it, do not write it)
  connect();
})();
