(function(){
function key(c){var v=c.getAttribute('data-sort');if(v===null){v=c.textContent;}
var n=parseFloat(v);return isNaN(n)?[1,v.toLowerCase()]:[0,n];}
function cmp(a,b){if(a[0]!==b[0]){return a[0]-b[0];}return a[1]<b[1]?-1:(a[1]>b[1]?1:0);}
function sortBy(th){var row=th.parentNode,table=th.closest('table'),body=table.tBodies[0];
var i=Array.prototype.indexOf.call(row.children,th);var asc=th.getAttribute('aria-sort')!=='ascending';
Array.prototype.forEach.call(row.children,function(h){h.removeAttribute('aria-sort');});
th.setAttribute('aria-sort',asc?'ascending':'descending');
var rows=Array.prototype.slice.call(body.rows);
rows.sort(function(a,b){var r=cmp(key(a.cells[i]),key(b.cells[i]));return asc?r:-r;});
rows.forEach(function(r){body.appendChild(r);});}
document.querySelectorAll('table.sortable thead th').forEach(function(th){th.tabIndex=0;
th.addEventListener('click',function(){sortBy(th);});
th.addEventListener('keydown',function(e){if(e.key==='Enter'){sortBy(th);}});});
var picker=document.getElementById('session-picker');
function pick(){var s=picker.value;
document.querySelectorAll('[data-session]').forEach(function(el){
el.hidden=!(s===''||el.getAttribute('data-session')===s);});
document.querySelectorAll('[data-figure-session]').forEach(function(el){
el.hidden=!(s===''?el.hasAttribute('data-latest'):el.getAttribute('data-figure-session')===s);});}
if(picker){picker.addEventListener('change',pick);pick();}
function check(){var imgs=document.images,ok=true;
for(var i=0;i<imgs.length;i++){if(!(imgs[i].complete&&imgs[i].naturalWidth>0)){ok=false;}}
document.body.setAttribute('data-images',String(imgs.length));
document.body.setAttribute('data-images-ok',ok?'true':'false');}
if(document.readyState==='complete'){check();}else{window.addEventListener('load',check);}
})();
