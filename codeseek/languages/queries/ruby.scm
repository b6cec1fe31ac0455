; Ruby units: methods, singleton methods, classes and modules. Blocks and
; lambdas are not captured: they stay inside their parent.
(method name: (_) @name) @function
(singleton_method name: (_) @name) @function
(class name: [(constant) (scope_resolution)] @name) @class
(module name: [(constant) (scope_resolution)] @name) @class
