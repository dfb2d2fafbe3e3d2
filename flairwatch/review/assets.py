"""The review pages' style sheet and script, served inline (the pages load nothing else).

The script drives the series page: it asks the server for one slice at a time as PNG, with the
window, opacity and outlines chosen, fetches the neighbouring slices ahead, and sends decisions
with ``fetch``. Keys (ignored while typing in a text field; Escape leaves it):

    a accept   r reject   n write a note   j / Down next slice   k / Up previous slice
    o outlines on/off   Space / Right next series   Left previous series

The page's ``data-*`` attributes give the series' facts; the body's ``data-shown`` (the slice
last drawn) and ``data-decided`` (decisions saved) let tests and users see what happened.
"""

from __future__ import annotations

STYLE = """
body{font-family:sans-serif;margin:0;background:#f4f4f4;color:#222}
main,header,footer{padding:.4em 1em}
.banner{background:#b00020;color:#fff;padding:.4em 1em;margin:0;font-weight:bold}
a{color:#0b4f8a}
table{border-collapse:collapse;background:#fff}td,th{border:1px solid #ccc;padding:.15em .45em;text-align:left}
.st-accepted{color:#1b5e20;font-weight:bold}.st-rejected{color:#b00020;font-weight:bold}
.st-unreviewed{color:#555}
.dispute{background:#fff3cd;border:1px solid #d39e00;padding:.3em .6em;font-weight:bold}
.layout{display:flex;gap:1.5em;flex-wrap:wrap;align-items:flex-start}
.layout>.view{flex:0 0 520px}.layout>.side{flex:1 1 22em;max-width:40em}
#slice{width:512px;image-rendering:pixelated;background:#000;display:block}
.controls label{display:block;margin:.2em 0}
.keys{color:#555;font-size:.9em}
#msg{min-height:1.3em;font-weight:bold}
button{font-size:1em;padding:.3em .8em;margin-right:.4em}
textarea{width:100%;max-width:30em}
.muted{color:#666}
"""

SERIES_SCRIPT = """
(function(){
var v=document.getElementById('viewer');if(!v)return;
var d=v.dataset,depth=+d.depth,k=+d.start,ahead={};
function el(id){return document.getElementById(id);}
var img=el('slice'),slider=el('k');
function say(t){el('msg').textContent=t;}
function params(){var on=[],b=document.querySelectorAll('input[data-layer]');
for(var i=0;i<b.length;i++)if(b[i].checked)on.push(b[i].dataset.layer);
return 'level='+encodeURIComponent(el('level').value)+'&width='+encodeURIComponent(el('width').value)
+'&opacity='+el('opacity').value+'&layers='+on.join(',')+'&v='+d.version;}
function url(n){return d.sliceBase+n+'.png?'+params();}
function show(){img.src=url(k);el('pos').textContent='slice '+(k+1)+' of '+depth;slider.value=k;
[k+1,k-1,k+2].forEach(function(n){if(n>=0&&n<depth){var u=url(n);
if(!ahead[u]){ahead[u]=new Image();ahead[u].src=u;}}});}
function step(n){var m=Math.min(depth-1,Math.max(0,k+n));if(m!==k){k=m;show();}}
function go(u){if(u)location.href=u;else say('no more series in this queue');}
img.onload=function(){document.body.dataset.shown=k;};
function decide(mark){var f=el('decide');
if(f.dataset.named!=='1'){say('enter your name first (top of the page)');el('name').focus();return;}
var body=new URLSearchParams();body.set('mark',mark);body.set('note',el('note').value);
body.set('result',f.dataset.result);say('saving ...');
fetch(f.dataset.action,{method:'POST',body:body,headers:{'Accept':'application/json'},
credentials:'same-origin'}).then(function(r){return r.json().then(function(j){return [r.ok,j];});})
.then(function(x){var j=x[1];if(!x[0]){say(j.error||'not saved');return;}
el('history').innerHTML=j.history;el('status').textContent=j.status;el('status').className='st-'+j.status;
el('dispute').innerHTML=j.dispute;el('note').value='';say(j.message);
document.body.dataset.decided=String(+(document.body.dataset.decided||0)+1);
if(el('auto').checked&&d.next)setTimeout(function(){go(d.next);},400);})
.catch(function(){say('not saved: the server did not answer; try again');});}
el('accept').onclick=function(){decide('accepted');};
el('reject').onclick=function(){decide('rejected');};
el('note-button').onclick=function(){el('note').focus();};
el('next').onclick=function(){go(d.next);};
el('prev').onclick=function(){go(d.prev);};
slider.oninput=function(){k=+slider.value;show();};
var c=document.querySelectorAll('.controls input');
for(var i=0;i<c.length;i++)c[i].onchange=show;
el('opacity').oninput=show;
el('auto').checked=localStorage.getItem('fw-auto')!=='0';
el('auto').onchange=function(){localStorage.setItem('fw-auto',el('auto').checked?'1':'0');};
img.addEventListener('wheel',function(e){step(e.deltaY>0?1:-1);e.preventDefault();},{passive:false});
document.addEventListener('keydown',function(e){var t=e.target;
if(t.tagName==='TEXTAREA'||(t.tagName==='INPUT'&&t.type==='text')){if(e.key==='Escape')t.blur();return;}
if(e.ctrlKey||e.metaKey||e.altKey)return;
switch(e.key){case 'j':case 'ArrowDown':step(1);break;case 'k':case 'ArrowUp':step(-1);break;
case 'a':decide('accepted');break;case 'r':decide('rejected');break;case 'n':el('note').focus();break;
case 'o':var w=document.querySelector('input[data-layer=wmh]');if(w){w.checked=!w.checked;show();}break;
case ' ':case 'ArrowRight':go(d.next);break;case 'ArrowLeft':go(d.prev);break;default:return;}
e.preventDefault();});
show();})();
"""
