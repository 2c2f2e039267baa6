// Vigil status page script (vendored, no library). Live updates of the overview by
// server-sent events, falling back to polling; operator buttons; refresh of session plots.
// Data from the server is only ever set as text (textContent), never parsed as markup.
"use strict";

(function () {
  const board = document.getElementById("board");
  const strip = document.getElementById("strip");
  const icons = document.getElementById("icons");

  function iconNode(kind) {
    const holder = icons && (icons.content.querySelector('[data-icon="' + kind + '"]') ||
                             icons.content.querySelector('[data-icon="ended_early"]'));
    return holder ? holder.firstElementChild.cloneNode(true) : document.createTextNode("");
  }

  function alarmItem(alarm, box) {
    const li = document.createElement("li");
    li.className = "al al-" + alarm.kind;
    li.dataset.kind = alarm.kind;
    li.appendChild(iconNode(alarm.kind));
    if (box !== undefined) {
      const b = document.createElement("b");
      b.textContent = box;
      li.appendChild(b);
    }
    const span = document.createElement("span");
    span.textContent = alarm.text;
    li.appendChild(span);
    return li;
  }

  // ---------------------------------------------------------------- overview
  if (board) {
    const tiles = new Map();
    board.querySelectorAll(".tile").forEach((t) => tiles.set(t.dataset.box, t));
    const asof = document.getElementById("asof");
    const feed = document.getElementById("feed");
    let lastUpdate = Date.now();

    function applyTile(t) {
      const tile = tiles.get(t.box);
      if (!tile) return;
      for (const [key, text] of Object.entries(t.shown)) {
        const cell = tile.querySelector('[data-f="' + key + '"]');
        if (cell && cell.textContent !== text) cell.textContent = text;
      }
      if (tile.dataset.state !== t.state) {
        tile.dataset.state = t.state;
        const slot = tile.querySelector("[data-icon-slot]");
        if (slot) slot.replaceChildren(iconNode(t.state));
        tile.querySelectorAll("button[data-act]").forEach((b) => {
          const act = b.dataset.act;
          b.hidden = t.state === "ended" || (act === "pause" && t.state !== "running") ||
                     (act === "resume" && t.state !== "paused");
        });
      }
      tile.dataset.alarmed = t.alarms.length ? "yes" : "no";
      const list = tile.querySelector("[data-alarms]");
      list.replaceChildren(...t.alarms.map((a) => alarmItem(a)));
    }

    function apply(data) {
      if ((board.dataset.boxes || "") !== data.boxes.join("\n")) {
        window.location.reload();  // boxes came or went: take the new layout
        return;
      }
      data.tiles.forEach(applyTile);
      if (strip) {
        strip.dataset.count = String(data.strip.length);
        strip.querySelector(".quiet").hidden = data.strip.length > 0;
        strip.querySelector(".alarmlist").replaceChildren(
          ...data.strip.map((a) => alarmItem(a, a.box)));
      }
      asof.textContent = data.at;
      const storeline = document.getElementById("storeline");
      if (storeline) storeline.textContent = data.store ? " · " + data.store : "";
      lastUpdate = Date.now();
      document.body.dataset.stale = "no";
    }

    let polling = false;
    function startPolling() {
      if (polling) return;
      polling = true;
      feed.textContent = " · updating every 2 s";
      const tick = () => {
        fetch("/api/board", { credentials: "same-origin", cache: "no-store" })
          .then((r) => (r.ok ? r.json() : Promise.reject(r.status)))
          .then(apply)
          .catch(() => {})
          .finally(() => setTimeout(tick, 2000));
      };
      tick();
    }

    if ("EventSource" in window) {
      let failures = 0;
      const source = new EventSource("/api/live");
      source.addEventListener("board", (event) => {
        failures = 0;
        apply(JSON.parse(event.data));
      });
      source.onerror = () => {
        failures += 1;
        if (failures >= 3) {
          source.close();
          startPolling();
        }
      };
    } else {
      startPolling();
    }

    // A page that silently stops updating is worse than none: say so, loudly.
    setInterval(() => {
      const quiet = (Date.now() - lastUpdate) / 1000;
      if (quiet > 6) {
        document.body.dataset.stale = "yes";
        feed.textContent = " · NO UPDATE FOR " + Math.round(quiet) + " s: check the Vigil computer";
      } else if (!polling) {
        feed.textContent = " · live updates";
      }
    }, 1000);

    // operator buttons on the tiles
    const tokenField = document.getElementById("optoken");
    const say = document.getElementById("opsay");
    board.addEventListener("click", (event) => {
      const button = event.target.closest("button[data-act]");
      if (!button) return;
      const tile = button.closest(".tile");
      const act = button.dataset.act;
      const token = tokenField ? tokenField.value : "";
      if (!token) {
        say.textContent = "enter the operator token first";
        tokenField.focus();
        return;
      }
      if (act === "stop" && !window.confirm("Stop the session on " + tile.dataset.box + "?")) return;
      fetch("/api/sessions/" + tile.dataset.session + "/" + act, {
        method: "POST", credentials: "same-origin", headers: { "X-Vigil-Token": token },
      })
        .then((r) => r.json().then((body) => {
          say.textContent = tile.dataset.box + ": " + (r.ok ? act + " requested" : body.detail);
        }))
        .catch(() => { say.textContent = "the request did not reach Vigil"; });
    });
  }

  // ---------------------------------------------------------------- session page
  const panels = document.getElementById("panels");
  if (panels && panels.dataset.refresh) {
    setInterval(() => {
      fetch(panels.dataset.refresh, { credentials: "same-origin", cache: "no-store" })
        .then((r) => (r.ok ? r.text() : Promise.reject(r.status)))
        .then((html) => { panels.innerHTML = html; })  // markup escaped by the server
        .catch(() => {});
    }, 10000);
  }
})();
