// The open board asks for changes every few seconds and swaps in the new rows; nothing else reloads.
// It also opens the acknowledge dialog. Without scripts the board still shows and links each Flag.
(function () {
  "use strict";
  var table = document.getElementById("board");
  if (!table) { return; }
  var rows = document.getElementById("rows");
  var status = document.getElementById("live-status");
  var count = document.getElementById("count");
  var digest = table.getAttribute("data-digest");
  var every = parseInt(table.getAttribute("data-refresh"), 10) || 5000;
  var dialog = document.getElementById("ack-dialog");

  function clock() { return new Date().toLocaleTimeString([], { hour: "2-digit", minute: "2-digit", second: "2-digit" }); }

  function refresh() {
    fetch("/board/rows?digest=" + encodeURIComponent(digest), { credentials: "same-origin", headers: { "Accept": "text/html" } })
      .then(function (response) {
        if (response.status === 401) { window.location.assign("/board/login?next=%2Fboard"); return null; }
        if (response.status === 204) { status.textContent = "Checked at " + clock() + "; no change."; return null; }
        if (!response.ok) { status.textContent = "Could not update at " + clock() + " (" + response.status + "); retrying."; return null; }
        var before = rows.querySelectorAll("tr[data-flag]").length;
        digest = response.headers.get("X-Board-Digest") || digest;
        return response.text().then(function (html) {
          rows.innerHTML = html;
          var now = rows.querySelectorAll("tr[data-flag]").length;
          count.textContent = String(now);
          var change = now === before ? "" : (now > before ? (now - before) + " more active. " : (before - now) + " fewer active. ");
          status.textContent = "Updated at " + clock() + ". " + change + now + " active alert" + (now === 1 ? "" : "s") + ".";
        });
      })
      .catch(function () { status.textContent = "No connection at " + clock() + "; retrying."; })
      .finally(function () { window.setTimeout(refresh, every); });
  }
  window.setTimeout(refresh, every);

  if (dialog) {
    var form = document.getElementById("ack-form");
    rows.addEventListener("click", function (event) {
      var button = event.target.closest("button.ack-open");
      if (!button) { return; }
      form.setAttribute("action", "/board/flags/" + encodeURIComponent(button.getAttribute("data-flag")) + "/acknowledge");
      document.getElementById("ack-what").textContent = button.getAttribute("data-what");
      document.getElementById("ack-note").value = "";
      dialog.showModal();
      document.getElementById("ack-note").focus();
    });
    document.getElementById("ack-cancel").addEventListener("click", function () { dialog.close(); });
  }
})();
