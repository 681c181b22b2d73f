// Trialogue respondent page. Plain script, no framework: it reads the
// session's state, sends replies, shows the model's reply as it streams in,
// and returns to the survey. Everything rides on the token in the address;
// no cookies are used.
(function () {
  "use strict";
  var app = document.getElementById("app");
  if (!app) return;
  var base = "/c/" + encodeURIComponent(app.dataset.token);
  var T = JSON.parse(document.getElementById("texts").textContent);
  var log = document.getElementById("log");
  var draft = document.getElementById("draft");
  var form = document.getElementById("reply-form");
  var box = document.getElementById("reply");
  var send = document.getElementById("send");
  var counter = document.getElementById("counter");
  var status = document.getElementById("status");
  var alertBox = document.getElementById("alert");
  var retry = document.getElementById("retry");
  var cont = document.getElementById("continue");
  var state = null;
  var busy = false;
  var store = window.sessionStorage;
  var draftKey = "trialogue:draft:" + app.dataset.token;
  var pendingKey = "trialogue:pending:" + app.dataset.token;

  function fmt(s, v) {
    return String(s).replace(/\{(\w+)\}/g, function (_, k) { return v[k] !== undefined ? v[k] : ""; });
  }
  function newID() {
    var a = new Uint8Array(16);
    window.crypto.getRandomValues(a);
    return Array.prototype.map.call(a, function (b) { return ("0" + b.toString(16)).slice(-2); }).join("");
  }
  function saveDraft() { try { store.setItem(draftKey, box.value); } catch (e) { /* storage may be off */ } }
  function get(k) { try { return store.getItem(k); } catch (e) { return null; } }
  function put(k, v) { try { if (v === null) store.removeItem(k); else store.setItem(k, v); } catch (e) { /* ignore */ } }

  function addMessage(role, text) {
    var li = document.createElement("li");
    li.className = "msg " + role;
    var who = document.createElement("span");
    who.className = "who";
    who.textContent = role === "respondent" ? T.you : T.assistant;
    var p = document.createElement("p");
    p.textContent = text;
    li.appendChild(who);
    li.appendChild(p);
    log.appendChild(li);
  }
  // The reply form sticks to the bottom of the window and would cover the
  // newest messages: bring the end of the conversation into view.
  function nearBottom() {
    var d = document.documentElement;
    return d.scrollHeight - (window.scrollY + window.innerHeight) < 80;
  }
  function toBottom() { window.scrollTo(0, document.documentElement.scrollHeight); }
  function renderLog(s) {
    log.textContent = "";
    s.messages.forEach(function (m) { addMessage(m.role, m.text); });
  }
  function showAlert(text) {
    alertBox.textContent = text || "";
    alertBox.hidden = !text;
  }
  function render(s) {
    state = s;
    var chat = s.kind === "chat";
    if (chat) {
      var left = s.replies_max - s.replies_used;
      var line = s.replies_used >= s.replies_min ?
        fmt(T.counter_done, { used: s.replies_used, min: s.replies_min, max: s.replies_max }) :
        fmt(T.counter, { used: s.replies_used, min: s.replies_min, max: s.replies_max });
      if (left === 1) line += " " + T.last_reply;
      if (left <= 0) line = T.max_reached;
      counter.textContent = line;
      form.hidden = s.finished;
      box.disabled = busy || !s.can_reply;
      send.disabled = busy || !s.can_reply;
    }
    retry.hidden = busy || !s.failed;
    cont.hidden = busy || s.finished || !s.can_finish;
    if (!s.can_finish && s.wait_seconds > 0 && !s.finished) {
      status.textContent = T.read_first;
      window.setTimeout(refresh, s.wait_seconds * 1000 + 250);
    } else if (!busy) {
      status.textContent = "";
    }
  }
  function setBusy(b) {
    busy = b;
    status.textContent = b ? T.waiting : "";
    if (state) render(state);
  }

  // post sends a JSON body and, when the server streams, handles each event.
  function post(path, body, onEvent) {
    return fetch(base + path, {
      method: "POST",
      headers: { "Content-Type": "application/json", "Accept": "text/event-stream, application/json" },
      body: JSON.stringify(body || {}),
      credentials: "omit",
      cache: "no-store"
    }).then(function (res) {
      var ct = res.headers.get("Content-Type") || "";
      if (ct.indexOf("text/event-stream") === 0 && res.body && res.body.getReader) {
        return readEvents(res.body.getReader(), onEvent);
      }
      return res.json().then(function (data) {
        if (!res.ok) { onEvent("error", data); return; }
        onEvent("done", data);
      });
    });
  }
  function readEvents(reader, onEvent) {
    var dec = new TextDecoder();
    var buf = "";
    function pump() {
      return reader.read().then(function (r) {
        if (r.done) return;
        buf += dec.decode(r.value, { stream: true });
        var i;
        while ((i = buf.indexOf("\n\n")) >= 0) {
          var block = buf.slice(0, i);
          buf = buf.slice(i + 2);
          var ev = "message", data = "";
          block.split("\n").forEach(function (line) {
            if (line.indexOf("event:") === 0) ev = line.slice(6).trim();
            else if (line.indexOf("data:") === 0) data += line.slice(5).replace(/^ /, "");
          });
          onEvent(ev, data ? JSON.parse(data) : {});
        }
        return pump();
      });
    }
    return pump();
  }

  function streamModel(path, body, sentText) {
    var text = "";
    setBusy(true);
    showAlert("");
    return post(path, body, function (ev, d) {
      if (ev === "saved") {
        if (sentText !== undefined) { addMessage("respondent", sentText); box.value = ""; saveDraft(); put(pendingKey, null); toBottom(); }
      } else if (ev === "chunk") {
        var stick = (draft.hidden && sentText !== undefined) || nearBottom();
        text += d.text;
        draft.hidden = false;
        draft.querySelector("p").textContent = text;
        if (stick) toBottom();
      } else if (ev === "reset") {
        text = "";
        draft.querySelector("p").textContent = "";
      } else if (ev === "done") {
        draft.hidden = true;
        draft.querySelector("p").textContent = "";
        put(pendingKey, null);
        busy = false;
        status.textContent = "";
        var stickDone = sentText !== undefined || nearBottom();
        renderLog(d.state);
        render(d.state);
        if (stickDone) toBottom();
        if (sentText !== undefined) box.focus();
      } else if (ev === "error") {
        draft.hidden = true;
        busy = false;
        status.textContent = "";
        if (d.state) { renderLog(d.state); render(d.state); }
        showAlert(d.rule === "too_short" || d.rule === "too_long" || d.rule === "empty" ? d.error : (d.state && d.state.failed ? T.model_failed : (d.error || T.server_error)));
        if (d.rule && sentText !== undefined && !(d.state && d.state.failed)) box.focus();
      }
    }).catch(function () {
      busy = false;
      draft.hidden = true;
      showAlert(T.network_failed);
      return refresh();
    });
  }

  function refresh() {
    return fetch(base + "/state", { credentials: "omit", cache: "no-store" })
      .then(function (r) { return r.json(); })
      .then(function (s) {
        renderLog(s);
        render(s);
        // Back in a conversation already under way: show where it stands.
        if (s.replies_used > 0) toBottom();
        if (s.owed && !s.failed && !busy) return streamModel("/resume", {});
      })
      .catch(function () { showAlert(T.network_failed); });
  }

  form.addEventListener("submit", function (e) {
    e.preventDefault();
    if (busy || !state || !state.can_reply) return;
    var text = box.value;
    if (!text.trim()) { showAlert(T.too_short); box.focus(); return; }
    var pending = get(pendingKey);
    var id = pending && pending.indexOf(text.length + ":") === 0 ? pending.split(":")[1] : newID();
    put(pendingKey, text.length + ":" + id);
    streamModel("/reply", { text: text, client_id: id }, text);
  });
  box.addEventListener("input", saveDraft);
  box.addEventListener("keydown", function (e) {
    if (e.key === "Enter" && (e.ctrlKey || e.metaKey)) { e.preventDefault(); form.requestSubmit(); }
  });
  retry.addEventListener("click", function () { streamModel("/resume", {}).then(function () { box.focus(); }); });
  cont.addEventListener("click", function () {
    cont.disabled = true;
    fetch(base + "/finish", { method: "POST", headers: { "Accept": "application/json" }, credentials: "omit" })
      .then(function (r) { return r.json().then(function (d) { return { ok: r.ok, d: d }; }); })
      .then(function (x) {
        if (!x.ok) { cont.disabled = false; showAlert(x.d.error || T.server_error); return; }
        status.textContent = T.finished;
        var d = x.d;
        if (window.parent !== window) {
          try {
            window.parent.postMessage({ type: "trialogue:complete", rid: d.rid, code: d.code, arm_code: d.arm_code }, app.dataset.parentOrigin || "*");
          } catch (e) { /* a wrong origin is the study's to fix; navigation still happens */ }
        }
        try { window.top.location.href = d.return_url; } catch (e) { window.location.href = d.return_url; }
      })
      .catch(function () { cont.disabled = false; showAlert(T.network_failed); });
  });

  var saved = get(draftKey);
  if (saved) box.value = saved;
  refresh();
})();
