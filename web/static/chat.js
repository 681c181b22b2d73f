// Trialogue respondent page. Plain script, no framework: it reads the
// session's state, sends replies, shows the model's reply as it streams in,
// and returns to the survey. Everything rides on the token in the address;
// no cookies are used. Every text comes from the page's catalogue (#texts).
(function () {
  "use strict";
  var app = document.getElementById("app");
  if (!app) return;
  var base = "/c/" + encodeURIComponent(app.dataset.token);
  var T = JSON.parse(document.getElementById("texts").textContent);
  var $ = function (id) { return document.getElementById(id); };
  var log = document.querySelector("#log ol");
  var draft = $("draft"), draftText = draft.querySelector("p");
  var form = $("reply-form"), box = $("reply"), send = $("send"), counter = $("counter");
  var status = $("status"), alertBox = $("alert"), retry = $("retry"), cont = $("continue");
  var state = null, busy = false, leaving = false, waitTimer = 0;
  var store = window.sessionStorage;
  var draftKey = "trialogue:draft:" + app.dataset.token;
  var pendingKey = "trialogue:pending:" + app.dataset.token;
  var typingKey = "trialogue:typing:" + app.dataset.token;
  // With reduced motion the reply appears whole, without a typing effect.
  var calm = window.matchMedia && window.matchMedia("(prefers-reduced-motion: reduce)").matches;
  // Streaming needs a readable response body; without one, plain JSON.
  var canStream = !!(window.TextDecoder && window.ReadableStream && "body" in Response.prototype);

  function fmt(s, v) {
    return String(s || "").replace(/\{(\w+)\}/g, function (_, k) { return v[k] !== undefined ? v[k] : ""; });
  }
  function newID() {
    var a = new Uint8Array(16);
    window.crypto.getRandomValues(a);
    return Array.prototype.map.call(a, function (b) { return ("0" + b.toString(16)).slice(-2); }).join("");
  }
  function get(k) { try { return store.getItem(k); } catch (e) { return null; } }
  function put(k, v) { try { if (v === null) store.removeItem(k); else store.setItem(k, v); } catch (e) { /* storage may be off */ } }
  function saveDraft() { put(draftKey, box.value || null); }

  // How the reply in the box is being written, sent with it as "typing":
  // when the box first changed, changes typed, pastes and drops, and times
  // the page was hidden since the previous reply. Kept with the draft.
  var typing = null;
  function resetTyping() { typing = { start: 0, keys: 0, pastes: 0, hidden: 0 }; put(typingKey, null); }
  function saveTyping() { put(typingKey, JSON.stringify(typing)); }
  function touched() { if (!typing.start) typing.start = Date.now(); }
  function measures() {
    if (!typing.start) return undefined; // nothing written on this page: no measures
    var cap = function (n, max) { return Math.max(0, Math.min(Math.round(n), max)); };
    return { typing_ms: cap(Date.now() - typing.start, 86400000), keystrokes: cap(typing.keys, 1000000),
      pastes: cap(typing.pastes, 10000), hidden_count: cap(typing.hidden, 10000) };
  }

  function addMessage(role, text) {
    var li = document.createElement("li");
    li.className = "msg " + role;
    var who = document.createElement("span");
    who.className = "who";
    who.textContent = role === "respondent" ? T.you : T.assistant;
    var p = document.createElement("p");
    p.dir = "auto";
    p.textContent = text;
    li.appendChild(who);
    li.appendChild(p);
    log.appendChild(li);
  }
  // syncLog brings the log up to the state's messages by appending only
  // what is new, so that a screen reader announces each message once.
  function syncLog(msgs) {
    var items = log.children, i, same = items.length <= msgs.length;
    for (i = 0; same && i < items.length; i++) {
      same = items[i].classList.contains(msgs[i].role) && items[i].querySelector("p").textContent === msgs[i].text;
    }
    if (!same) { log.textContent = ""; i = 0; }
    for (; i < msgs.length; i++) addMessage(msgs[i].role, msgs[i].text);
  }
  // The dock sticks to the bottom of the window and would cover the newest
  // messages: bring the end of the conversation into view.
  function nearBottom() {
    var d = document.documentElement;
    return d.scrollHeight - (window.scrollY + window.innerHeight) < 80;
  }
  function toBottom() { window.scrollTo(0, document.documentElement.scrollHeight); }
  function showAlert(text) {
    alertBox.textContent = text || "";
    alertBox.hidden = !text;
  }
  function say(text, isBusy) {
    status.textContent = text || "";
    status.classList.toggle("busy", !!isBusy);
  }
  function ruleText(rule, fallback) {
    var s = state || {};
    var v = { min: s.replies_min, max: s.replies_max, min_words: s.min_words, max_chars: s.max_chars };
    if (rule === "too_early") return T.read_first;
    if (rule === "finished") return T.done_already;
    if (rule && T[rule]) return fmt(T[rule], v);
    return fallback || T.server_error;
  }

  function render(s) {
    state = s;
    if (s.kind === "chat") {
      var v = { used: s.replies_used, min: s.replies_min, max: s.replies_max };
      var left = s.replies_max - s.replies_used;
      counter.textContent = left <= 0 ? T.max_reached : fmt(s.replies_used >= s.replies_min ? T.counter_done : T.counter, v);
      if (left === 1 && !s.finished) {
        var warn = document.createElement("strong");
        warn.textContent = " " + T.last_reply;
        counter.appendChild(warn);
      }
      form.hidden = s.finished;
      var open = s.can_reply && !leaving;
      // While the model writes, the box stays focusable (read-only), so
      // focus never jumps away from it; once no reply is left, it is disabled.
      box.readOnly = busy;
      box.disabled = !busy && !open;
      send.disabled = busy || !open;
    }
    retry.hidden = busy || !s.failed;
    cont.hidden = busy || !(s.can_finish || s.finished);
    if (busy) return;
    window.clearTimeout(waitTimer);
    if (s.finished) say(leaving ? T.finished : T.done_already);
    else if (!s.can_finish && s.wait_seconds > 0) {
      say(T.read_first);
      waitTimer = window.setTimeout(refresh, s.wait_seconds * 1000 + 250);
    } else if (s.can_finish && !s.can_reply && s.kind === "chat") say(T.closing);
    else if (s.can_finish && s.kind !== "chat") say(T.closing);
    else say("");
    // Nothing left to type: keyboard users go on to what they can do next.
    if (document.activeElement === document.body || document.activeElement === box && box.disabled) {
      if (!cont.hidden) cont.focus(); else if (!retry.hidden) retry.focus();
    }
  }
  function setBusy(b) {
    busy = b;
    say(b ? T.waiting : "", b);
    if (state) render(state);
  }

  // post sends a JSON body; a streamed answer calls onEvent per event, a
  // plain JSON answer calls it once with "done" or "error".
  function post(path, body, onEvent, stream) {
    return fetch(base + path, {
      method: "POST",
      headers: { "Content-Type": "application/json", "Accept": stream ? "text/event-stream, application/json" : "application/json" },
      body: JSON.stringify(body || {}),
      credentials: "omit",
      cache: "no-store"
    }).then(function (res) {
      var ct = res.headers.get("Content-Type") || "";
      if (ct.indexOf("text/event-stream") === 0) return readEvents(res.body.getReader(), onEvent);
      return res.json().then(function (data) { onEvent(res.ok ? "done" : "error", data); });
    });
  }
  function readEvents(reader, onEvent) {
    var dec = new TextDecoder(), buf = "", ended = false;
    function pump() {
      return reader.read().then(function (r) {
        if (r.done) {
          if (!ended) throw new Error("stream ended early");
          return;
        }
        buf += dec.decode(r.value, { stream: true });
        var i;
        while ((i = buf.indexOf("\n\n")) >= 0) {
          var block = buf.slice(0, i), ev = "message", data = "";
          buf = buf.slice(i + 2);
          block.split("\n").forEach(function (line) {
            if (line.indexOf("event:") === 0) ev = line.slice(6).trim();
            else if (line.indexOf("data:") === 0) data += line.slice(5).replace(/^ /, "");
          });
          if (ev === "done" || ev === "error") ended = true;
          onEvent(ev, data ? JSON.parse(data) : {});
        }
        return pump();
      });
    }
    return pump();
  }

  // ask has the server write a model turn (after a reply, or the owed one)
  // and shows it. If the stream breaks, the same request is sent again as
  // plain JSON: the client_id makes it the same reply, never a second one.
  function ask(path, body, sentText) {
    var text = "";
    setBusy(true);
    showAlert("");
    function clearDraft() { text = ""; draftText.textContent = ""; draft.hidden = true; }
    function onEvent(ev, d) {
      if (ev === "saved") {
        if (sentText !== undefined) { addMessage("respondent", sentText); box.value = ""; saveDraft(); resetTyping(); toBottom(); }
      } else if (ev === "chunk") {
        if (calm) return;
        var stick = draft.hidden || nearBottom();
        text += d.text;
        draft.hidden = false;
        draftText.textContent = text;
        if (stick) toBottom();
      } else if (ev === "reset") {
        clearDraft();
      } else if (ev === "done") {
        clearDraft();
        put(pendingKey, null);
        if (sentText !== undefined && box.value === sentText) { box.value = ""; saveDraft(); resetTyping(); }
        var stick = sentText !== undefined || nearBottom();
        busy = false;
        syncLog(d.state.messages);
        render(d.state);
        if (stick) toBottom();
      } else if (ev === "error") {
        clearDraft();
        busy = false;
        if (d.state) { syncLog(d.state.messages); render(d.state); } else if (state) render(state);
        var failed = d.state && d.state.failed;
        // A fault on the server's side (no rule, no state: the database was
        // out of reach, say) keeps the pending send, so that sending again
        // is the same reply under the same id, stored once.
        var fault = !d.rule && !d.state;
        if (!fault && (!d.state || !failed)) put(pendingKey, null);
        showAlert(failed ? T.model_failed : ruleText(d.rule));
        toBottom();
        if (failed) retry.focus();
      }
    }
    return post(path, body, onEvent, canStream).catch(function () {
      clearDraft();
      return post(path, body, onEvent, false);
    }).catch(function () {
      busy = false;
      showAlert(T.network_failed);
      if (state) render(state);
    });
  }

  function refresh() {
    return fetch(base + "/state", { credentials: "omit", cache: "no-store" })
      .then(function (r) { return r.json(); })
      .then(function (s) {
        syncLog(s.messages);
        render(s);
        // Back in a conversation already under way: show where it stands.
        if (s.replies_used > 0) toBottom();
        if (s.owed && !s.failed && !busy) return ask("/resume", {});
        if (s.failed) showAlert(T.model_failed);
      })
      .catch(function () { showAlert(T.network_failed); });
  }

  form.addEventListener("submit", function (e) {
    e.preventDefault();
    box.focus();
    if (busy || !state || !state.can_reply) return;
    var text = box.value;
    if (!text.trim()) { showAlert(T.empty); return; }
    // The same text sent again after a failure keeps its id, so the server
    // stores it once.
    var pending = null;
    try { pending = JSON.parse(get(pendingKey)); } catch (err) { /* none kept */ }
    var again = pending && pending.text === text;
    var id = again ? pending.id : newID();
    var measured = again && pending.typing ? pending.typing : measures();
    put(pendingKey, JSON.stringify({ text: text, id: id, typing: measured }));
    var body = { text: text, client_id: id };
    if (measured) body.typing = measured;
    ask("/reply", body, text);
  });
  box.addEventListener("input", function (e) {
    saveDraft();
    touched();
    if (!/^insertFrom(Paste|Drop)/.test(e.inputType || "")) typing.keys++;
    saveTyping();
  });
  box.addEventListener("paste", function () { touched(); typing.pastes++; saveTyping(); });
  box.addEventListener("drop", function () { touched(); typing.pastes++; saveTyping(); });
  document.addEventListener("visibilitychange", function () {
    if (document.hidden) { typing.hidden++; saveTyping(); }
  });
  box.addEventListener("keydown", function (e) {
    if (e.key === "Enter" && (e.ctrlKey || e.metaKey)) { e.preventDefault(); form.requestSubmit(); }
  });
  retry.addEventListener("click", function () {
    ask("/resume", {}).then(function () { if (!box.disabled && !form.hidden) box.focus(); });
  });
  cont.addEventListener("click", function () {
    cont.disabled = true;
    fetch(base + "/finish", { method: "POST", headers: { "Accept": "application/json" }, credentials: "omit" })
      .then(function (r) { return r.json().then(function (d) { return { ok: r.ok, d: d }; }); })
      .then(function (x) {
        cont.disabled = false;
        if (!x.ok) { showAlert(ruleText(x.d.rule)); return; }
        leaving = true;
        put(draftKey, null);
        showAlert("");
        say(T.finished);
        var d = x.d;
        var leave = function () {
          try { window.top.location.href = d.return_url; } catch (e) { window.location.href = d.return_url; }
        };
        if (window.parent === window) { leave(); return; }
        try {
          window.parent.postMessage({ type: "trialogue:complete", rid: d.rid, code: d.code, arm_code: d.arm_code }, app.dataset.parentOrigin || "*");
        } catch (e) { /* a wrong origin is the study's to fix; navigation still happens */ }
        // A message is delivered as a task of the survey's page; moving its
        // window at once can unload it first. A moment's wait lets the survey
        // take the message before the return address replaces it.
        setTimeout(leave, 300);
      })
      .catch(function () { cont.disabled = false; showAlert(T.network_failed); });
  });

  var saved = get(draftKey);
  if (saved) box.value = saved;
  var kept = null;
  try { kept = JSON.parse(get(typingKey)); } catch (e) { /* none kept */ }
  resetTyping();
  if (saved && kept && typeof kept.keys === "number") { typing = kept; saveTyping(); }
  refresh();
})();
