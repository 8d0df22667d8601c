(function () {
  function key(td, num) {
    var v = td.getAttribute('data-v');
    if (v === null) v = td.textContent;
    if (!num) return v.toLowerCase();
    var x = parseFloat(v);
    return isNaN(x) ? null : x;
  }
  document.querySelectorAll('table.sortable').forEach(function (table) {
    var heads = table.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads, function (th, col) {
      var b = th.querySelector('button');
      if (!b) return;
      b.addEventListener('click', function () {
        var num = th.getAttribute('data-type') === 'num';
        var dir = th.getAttribute('aria-sort') === 'ascending' ? -1 : 1;
        Array.prototype.forEach.call(heads, function (h) { h.setAttribute('aria-sort', 'none'); });
        th.setAttribute('aria-sort', dir === 1 ? 'ascending' : 'descending');
        var body = table.tBodies[0];
        var rows = Array.prototype.slice.call(body.rows);
        rows.sort(function (ra, rb) {
          var a = key(ra.cells[col], num), c = key(rb.cells[col], num);
          if (a === null && c === null) return 0;
          if (a === null) return 1;   // empty cells last either way
          if (c === null) return -1;
          if (num) return dir * (a - c);
          return dir * a.localeCompare(c);
        });
        rows.forEach(function (r) { body.appendChild(r); });
      });
    });
  });
})();
